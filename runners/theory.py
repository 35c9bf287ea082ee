"""Theory prescreen: rate-form plasticity drift, LIF transfer functions and mean-field fixed points.

Pure numpy/scipy (no Brian2). Everything reads a point's nested config (``capsweep.registry``).

Units: rates in Hz, voltages in mV, times in seconds unless a name says otherwise, weights and
conductances in units of the leak conductance ``g_leak`` (dimensionless), plasticity drift in
g_leak per second.

Model of one conductance-based LIF cell (the network of ``runners/model.py``)::

    tau_m dV/dt = (E_L - V) + g_e (E_exc - V) + g_i (E_inh - V)

where each Poisson input of weight ``w`` makes its conductance jump by ``w`` and decay with
``tau_exc`` or ``tau_inh``. The diffusion approximation replaces the conductances by their
means (which set an effective time constant and mean potential) plus Gaussian fluctuations of
the free membrane potential; the rate then follows from the Siegert formula.

Populations in the mean field: cued members ``C`` and uncued members ``U`` of one assembly
(the "focal" assembly), members ``B`` of the other assemblies, non-members ``O`` and
inhibitory cells ``I``. Assemblies are treated as disjoint groups of ``assemblies.size``
cells; connections are random with fixed in-degree, so a cell receives
``indegree_exc * (group size / n_exc)`` inputs from each excitatory group.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np
from scipy import integrate, optimize, special

FB_SHIFT = 1.0326
"""|zeta(1/2)| / sqrt(2): Fourcaud & Brunel (2002) boundary shift per sqrt(tau_syn / tau_m)."""

_NO_RATE = 26.0  # upper Siegert bound (in sigma) beyond which exp(u**2) overflows: rate is 0


# --------------------------------------------------------------------------- plasticity drift


def _trace_third_moment(rate_hz: float, tau_s: float) -> float:
    """E[z**3] of an exponential trace (jump 1, decay tau_s) driven by a Poisson train.

    Shot-noise cumulants are kappa_n = rate * tau / n, so
    E[z^3] = kappa3 + 3 kappa2 kappa1 + kappa1^3 = (r tau)^3 + 1.5 (r tau)^2 + (r tau) / 3.
    """
    x = rate_hz * tau_s
    return x**3 + 1.5 * x**2 + x / 3.0


def rule_drift(cfg: dict, rate_pre_hz: float, rate_post_hz: float, w: float, w_ref: float) -> float:
    """Mean E->E weight drift (g_leak/s) for independent Poisson pre and post trains.

    Rate form of the rule in ``runners/rules.py`` (REFERENCES.md 2; Zenke, Agnes & Gerstner
    2015), each term only when its ``enabled`` key is true::

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


def _sign_changes(f: Callable[[float], float], grid: np.ndarray) -> list[float]:
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
    return _sign_changes(lambda ry: rule_drift(cfg, rate_pre_hz, ry, w, w_ref), grid)


def bcm_threshold_hz(cfg: dict) -> float:
    """Post rate (Hz) where the triplet part alone changes sign: B tau_minus / (A tau_plus tau_slow).

    Infinite when the triplet term is off or has no LTP.
    """
    tri = cfg["plasticity"]["triplet"]
    ltp = tri["a_ltp"] * tri["tau_plus_ms"] * tri["tau_slow_ms"] * 1e-6
    if not tri["enabled"] or ltp <= 0:
        return math.inf
    return tri["b_ltd"] * tri["tau_minus_ms"] * 1e-3 / ltp


# --------------------------------------------------------------------------- LIF transfer


def lif_rate_noise_free(mu_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                        v_reset_mv: float) -> float:
    """Rate (Hz) of a LIF neuron with constant drive: 1/(t_ref + tau ln((mu-Vr)/(mu-Vth))), 0 below threshold.

    Dayan & Abbott 2001, Theoretical Neuroscience, eq. 5.11; ``mu_mv`` is the steady-state
    potential the drive would hold the membrane at without a threshold.
    """
    if mu_mv <= v_th_mv:
        return 0.0
    return 1.0 / (t_ref_s + tau_m_s * math.log((mu_mv - v_reset_mv) / (mu_mv - v_th_mv)))


def _erfcx_neg_integral(lo: float, hi: float) -> float:
    """Integral of erfcx(-u) du from lo to hi (lo <= hi).

    On u <= 0 the integrand is erfcx(|u|) <= 1 and quad is accurate. On u > 0 it is
    2 exp(u^2) - erfcx(u), whose first part integrates to sqrt(pi) erfi(u) in closed form.
    """
    total = 0.0
    if lo < 0.0:
        total += integrate.quad(lambda u: special.erfcx(-u), lo, min(hi, 0.0), limit=200)[0]
    if hi > 0.0:
        a = max(lo, 0.0)
        total += math.sqrt(math.pi) * (special.erfi(hi) - special.erfi(a))
        total -= integrate.quad(special.erfcx, a, hi, limit=200)[0]
    return total


def siegert_rate(mu_mv: float, sigma_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                 v_reset_mv: float, tau_syn_s: float = 0.0) -> float:
    """Rate (Hz) of a LIF neuron driven by white noise (Siegert; Amit & Brunel 1997; Brunel 2000).

    Convention ``tau dV/dt = -V + mu + sigma sqrt(tau) xi``::

        1/r = t_ref + tau sqrt(pi) * int_{(Vr-mu)/sigma}^{(Vth-mu)/sigma} erfcx(-u) du

    ``tau_syn_s > 0`` applies the Fourcaud & Brunel (2002) correction for synaptic filtering:
    both bounds shift by 1.0326 sqrt(tau_syn/tau_m). ``sigma_mv <= 0`` gives the noise-free rate.
    """
    if sigma_mv <= 0.0:
        return lif_rate_noise_free(mu_mv, tau_m_s, t_ref_s, v_th_mv, v_reset_mv)
    shift = FB_SHIFT * math.sqrt(tau_syn_s / tau_m_s)
    hi = (v_th_mv - mu_mv) / sigma_mv + shift
    lo = (v_reset_mv - mu_mv) / sigma_mv + shift
    if hi > _NO_RATE:
        return 0.0
    return 1.0 / (t_ref_s + tau_m_s * math.sqrt(math.pi) * _erfcx_neg_integral(lo, hi))


# --------------------------------------------------------------------------- conductance neuron


@dataclass(frozen=True)
class Input:
    """A bundle of independent Poisson inputs onto one cell."""

    count: float  # number of sources
    weight: float  # conductance jump per spike, g_leak
    rate_hz: float  # rate of each source
    excitatory: bool


@dataclass(frozen=True)
class Membrane:
    """Diffusion approximation of the free membrane potential of a conductance-based LIF cell."""

    mu_mv: float  # mean free potential
    sd_mv: float  # standard deviation of the free potential
    tau_eff_s: float  # effective time constant tau_m / (1 + mean conductances)
    tau_syn_s: float  # variance-weighted synaptic time constant
    sd_in_mv: float  # s.d. of the filtered input (the potential it would impose without membrane filtering)


def membrane(cfg: dict, inputs: list[Input]) -> Membrane:
    """Mean, s.d. and effective time constant of the free potential under Poisson ``inputs``.

    Mean conductances g_k = sum count * w * rate * tau_k set g_tot = 1 + g_e + g_i,
    tau_eff = tau_m / g_tot and mu = (E_L + g_e E_exc + g_i E_inh) / g_tot. Around mu each input
    acts as a current ``w (E_k - mu) / g_tot``; an exponentially filtered shot noise passed
    through the membrane filter has variance (Campbell's theorem)
    ``count rate (w (E_k - mu)/g_tot)^2 tau_k^2 / (2 (tau_k + tau_eff))``.
    """
    net = cfg["network"]
    tau_m = net["tau_m_ms"] * 1e-3
    taus = {True: net["tau_exc_ms"] * 1e-3, False: net["tau_inh_ms"] * 1e-3}
    revs = {True: net["e_exc_mv"], False: net["e_inh_mv"]}
    g = {True: 0.0, False: 0.0}
    for i in inputs:
        g[i.excitatory] += i.count * i.weight * i.rate_hz * taus[i.excitatory]
    g_tot = 1.0 + g[True] + g[False]
    tau_eff = tau_m / g_tot
    mu = (net["e_leak_mv"] + g[True] * revs[True] + g[False] * revs[False]) / g_tot
    var, var_tau, var_in = 0.0, 0.0, 0.0
    for i in inputs:
        tau_k = taus[i.excitatory]
        current = i.count * i.rate_hz * (i.weight * (revs[i.excitatory] - mu) / g_tot) ** 2 * tau_k / 2.0
        v = current * tau_k / (tau_k + tau_eff)
        var += v
        var_tau += v * tau_k
        var_in += current
    tau_syn = var_tau / var if var > 0 else 0.0
    return Membrane(mu, math.sqrt(var), tau_eff, tau_syn, math.sqrt(var_in))


_Z = np.linspace(-8.0, 8.0, 1601)
_Z_WEIGHTS = np.exp(-0.5 * _Z**2) / np.exp(-0.5 * _Z**2).sum()


def adiabatic_rate(mu_mv: float, sd_in_mv: float, tau_m_s: float, t_ref_s: float, v_th_mv: float,
                   v_reset_mv: float) -> float:
    """Rate (Hz) for slow Gaussian input: the noise-free rate averaged over the input distribution.

    Long-synaptic-time-constant (adiabatic) limit of colored-noise LIF theory (Moreno-Bote &
    Parga 2004, Phys Rev Lett 92:028102 [memory]): the input changes slowly compared with the
    membrane, so the cell fires at ``lif_rate_noise_free(mu + x)`` with x ~ N(0, sd_in^2), where
    sd_in is the s.d. of the filtered input (the steady-state potential it would impose).
    """
    mu = mu_mv + sd_in_mv * _Z
    above = mu > v_th_mv
    rates = np.zeros_like(mu)
    ratio = (mu[above] - v_reset_mv) / (mu[above] - v_th_mv)
    rates[above] = 1.0 / (t_ref_s + tau_m_s * np.log(ratio))
    return float(np.dot(_Z_WEIGHTS, rates))


TRANSFER_METHODS = ("adiabatic", "siegert", "siegert_fb")


def cell_rate(cfg: dict, inputs: list[Input], excitatory: bool, method: str = "adiabatic") -> float:
    """Firing rate (Hz) of an E (``excitatory``) or I cell under Poisson ``inputs``.

    ``method``:

    - ``"adiabatic"`` (default): :func:`adiabatic_rate` with the s.d. of the filtered input
      (``Membrane.sd_in_mv``). In the high-conductance states of this model
      tau_syn/tau_eff is 0.6-1.5, far from the white-noise limit; against a direct simulation
      of single cells (independent Poisson inputs, dt 0.1 ms) this is within about 25 %, where
      the Siegert forms err by factors of 2-3.
    - ``"siegert"``: Siegert formula at the free-membrane mean and s.d. (sigma = sqrt(2) sd,
      since white noise of intensity sigma gives variance sigma^2/2); overestimates here.
    - ``"siegert_fb"``: white-noise-equivalent sigma (sd inflated by
      sqrt((tau_syn + tau_eff)/tau_eff)) with the Fourcaud-Brunel boundary shift; underestimates.
    """
    net = cfg["network"]
    m = membrane(cfg, inputs)
    t_ref = (net["refractory_exc_ms"] if excitatory else net["refractory_inh_ms"]) * 1e-3
    v_th, v_r = net["v_threshold_mv"], net["v_reset_mv"]
    if method == "adiabatic":
        return adiabatic_rate(m.mu_mv, m.sd_in_mv, m.tau_eff_s, t_ref, v_th, v_r)
    sigma = math.sqrt(2.0) * m.sd_mv
    if method == "siegert":
        return siegert_rate(m.mu_mv, sigma, m.tau_eff_s, t_ref, v_th, v_r)
    if method == "siegert_fb":
        sigma *= math.sqrt((m.tau_syn_s + m.tau_eff_s) / m.tau_eff_s)
        return siegert_rate(m.mu_mv, sigma, m.tau_eff_s, t_ref, v_th, v_r, m.tau_syn_s)
    raise ValueError(f"unknown transfer method {method!r}; use one of {TRANSFER_METHODS}")


# --------------------------------------------------------------------------- network mean field

E_GROUPS = ("C", "U", "B", "O")
"""Excitatory groups: cued / uncued members of the focal assembly, other members, non-members."""


@dataclass(frozen=True)
class Weights:
    """Synaptic weights (g_leak) the mean field uses; I->E may differ per E group (inhibitory STDP)."""

    within: float  # E->E inside an assembly
    between: float  # every other E->E synapse
    e_to_i: float
    i_to_i: float
    i_to_e: dict[str, float] = field(default_factory=dict)  # E group -> weight


def initial_weights(cfg: dict) -> Weights:
    """Weights at the start of a run: prewired assemblies at prewire_gain x w_e_to_e."""
    net, asm = cfg["network"], cfg["assemblies"]
    gain = asm["prewire_gain"] if asm["imprint"] == "prewired" else 1.0
    return Weights(within=gain * net["w_e_to_e"], between=net["w_e_to_e"], e_to_i=net["w_e_to_i"],
                   i_to_i=net["w_i_to_i"], i_to_e={g: net["w_i_to_e"] for g in E_GROUPS})


def group_fractions(cfg: dict, cued: bool = False) -> dict[str, float]:
    """Fraction of the E cells in each group (disjoint assemblies, capped at n_exc)."""
    net, asm, pr = cfg["network"], cfg["assemblies"], cfg["protocol"]
    n = net["n_exc"]
    f = min(asm["size"], n) / n if asm["count"] > 0 else 0.0
    f_other = min(max(asm["count"] - 1, 0) * f, 1.0 - f)
    c = pr["cue_fraction"] if cued else 0.0
    return {"C": c * f, "U": (1.0 - c) * f, "B": f_other, "O": max(1.0 - f - f_other, 0.0)}


@dataclass(frozen=True)
class Scenario:
    """What the mean field is asked about: weights, group sizes and whether the cue is on."""

    weights: Weights
    fractions: dict[str, float]
    cue_on: bool = False


def _inputs(cfg: dict, sc: Scenario, target: str, rates: dict[str, float]) -> list[Input]:
    """Poisson inputs onto one cell of group ``target`` ("I" or an E group) at the given rates."""
    net, pr = cfg["network"], cfg["protocol"]
    k_e, k_i, w = net["indegree_exc"], net["indegree_inh"], sc.weights
    members = ("C", "U")
    if target == "I":
        ins = [Input(net["drive_inputs"], net["drive_weight"], net["drive_rate_inh_hz"], True)]
        ins += [Input(k_e * sc.fractions[g], w.e_to_i, rates[g], True) for g in E_GROUPS]
        ins.append(Input(k_i, w.i_to_i, rates["I"], False))
        return ins
    ins = [Input(net["drive_inputs"], net["drive_weight"], net["drive_rate_exc_hz"], True)]
    if target == "C" and sc.cue_on:
        ins.append(Input(1.0, pr["cue_weight"], pr["cue_rate_hz"], True))
    size_frac = sc.fractions["C"] + sc.fractions["U"]
    for g in E_GROUPS:
        same = (target in members and g in members)
        frac = sc.fractions[g]
        if target == "B" and g == "B":  # a B cell's own assembly is one of the other assemblies
            own = min(size_frac, frac)
            ins.append(Input(k_e * own, w.within, rates[g], True))
            frac -= own
        ins.append(Input(k_e * frac, w.within if same else w.between, rates[g], True))
    ins.append(Input(k_i, w.i_to_e[target], rates["I"], False))
    return ins


def group_rate(cfg: dict, sc: Scenario, target: str, rates: dict[str, float]) -> float:
    """Output rate (Hz) of one cell of group ``target`` given all presynaptic group rates."""
    return cell_rate(cfg, _inputs(cfg, sc, target, rates), excitatory=(target != "I"))


def _max_rate(cfg: dict, excitatory: bool) -> float:
    net = cfg["network"]
    t_ref = (net["refractory_exc_ms"] if excitatory else net["refractory_inh_ms"]) * 1e-3
    return 1.0 / t_ref if t_ref > 0 else 1000.0


def _solve_inh(cfg: dict, sc: Scenario, rates: dict[str, float]) -> float:
    """Self-consistent I rate (Hz) for fixed E rates: unique, since I->I only inhibits."""
    top = _max_rate(cfg, False) * 0.999
    f = lambda r: group_rate(cfg, sc, "I", {**rates, "I": r}) - r
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
    top = top_hz or 0.97 * _max_rate(cfg, True)
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
    for x in _sign_changes(lambda x: out(x) - x, grid):
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
    top = top_hz or 0.97 * _max_rate(cfg, True)
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


def active_threshold_hz(cfg: dict, background_exc_hz: float) -> float:
    """Rate (Hz) above which a cell counts as active: max(active_factor x baseline, active_floor_hz)."""
    det = cfg["detection"]
    return max(det["active_factor"] * background_exc_hz, det["active_floor_hz"])


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
    state when its rate exceeds ``active_hz`` (default: :func:`active_threshold_hz` of this
    background); it may be the only crossing (a monostable "on" assembly). Cue: the cued fraction of the focal assembly gets the cue's extra Poisson input.
    """
    w = weights or initial_weights(cfg)
    sc = Scenario(w, group_fractions(cfg))
    bg_curve = _population_curve(cfg, sc, None)
    background = solve_rates(cfg, sc, {}, sorted(bg_curve.fixed_points, key=lambda f: f.rate_hz)[0].rates)
    asm_curve, active, cue = None, None, None
    if sc.fractions["U"] > 0:
        asm_curve = transfer_curve(cfg, sc, ("U",), "U", background)
        on_hz = active_hz if active_hz is not None else active_threshold_hz(cfg, mean_exc_rate(sc, background))
        active = _active_state(asm_curve, on_hz)
        if with_cue:
            sc_cue = Scenario(w, group_fractions(cfg, cued=True), cue_on=True)
            cue = solve_rates(cfg, sc_cue, {}, background)
    active_exc = mean_exc_rate(sc, active.rates) if active else math.nan
    return PopulationRates(background, mean_exc_rate(sc, background), bg_curve, asm_curve, active,
                           active_exc, cue)


# --------------------------------------------------------------------------- prediction


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
    4. Inhibitory STDP (if on, eta > 0) raises I->E weights onto over-active cells until they
       fire at rho0; it can at most reach its cap, so the check uses I->E onto members at
       max(initial, w_max of the inhibitory rule).
    5. Network-wide growth: if the rule has no bound and its drift at the background rates is
       positive, every E->E weight goes to w_max; the background state is re-solved there.
    6. Runaway if, at those end weights, a stable self-sustained state exists whose population
       E rate exceeds the threshold (one assembly active), or the background itself does;
       otherwise stable. ``high_rate_bounded`` says whether the rule or inhibitory STDP holds
       high rates in check.

    Limitations: spike correlations (which add STDP potentiation inside active assemblies) and
    the time it takes plasticity to act are ignored; assemblies are treated as disjoint.
    """
    det, p, net = cfg["detection"], cfg["plasticity"], cfg["network"]
    w0 = initial_weights(cfg)
    start = population_rates(cfg, w0)
    bg = start.background_exc_hz
    threshold = max(det["runaway_factor"] * bg, det["runaway_floor_hz"])
    w_max = p["triplet"]["w_max"]
    member_bg = start.background["U"] if start.assembly_curve is not None else bg
    crossings = drift_zero_crossings(cfg, member_bg, w_max, w0.within)
    top = 0.97 * _max_rate(cfg, True)
    rule_bounded = rule_drift(cfg, top, top, w_max, w0.within) < 0.0
    istdp = p["inhibitory"]["enabled"] and p["inhibitory"]["eta"] > 0
    common = dict(
        recall_state_exists=start.assembly is not None, background_rate_hz=bg,
        assembly_rate_hz=start.assembly.rate_hz if start.assembly else math.nan,
        drift_zero_crossings_hz=crossings, runaway_threshold_hz=threshold,
        cued_rate_hz=start.cue["C"] if start.cue else math.nan,
        uncued_member_rate_hz=start.cue["U"] if start.cue else math.nan)
    reasons = [f"background E {bg:.2f} Hz, I {start.background['I']:.2f} Hz; runaway threshold "
               f"{threshold:.1f} Hz; BCM-like threshold {bcm_threshold_hz(cfg):.2f} Hz"]
    if bg < det["silence_hz"]:
        reasons.append(f"background below silence threshold {det['silence_hz']} Hz")
        return Prediction("silent", high_rate_bounded=True, reasons="; ".join(reasons), **common)

    weights = w0
    w_between = weight_equilibrium(cfg, bg, bg, w0.between)
    if w_between >= w_max and not rule_bounded:
        weights = replace(weights, between=w_max)
        reasons.append("drift at background rates is positive and unbounded: all E->E weights go to w_max")
    high_exc, w_end, held_by_istdp = math.nan, weights.within, False
    if start.cue is not None:
        drive = start.cue["C"]
        w_end, active, high_exc = _end_within_weight(cfg, weights, drive, istdp, active_threshold_hz(cfg, bg))
        reasons.append(f"assembly weight -> {w_end:.3f} (from {w0.within:.3f}) after cue at {drive:.1f} Hz")
        if active is None:
            reasons.append("no self-sustained assembly state at that weight")
        else:
            reasons.append(f"self-sustained assembly state {active.rate_hz:.1f} Hz, E mean {high_exc:.2f} Hz")
        if istdp and active is not None and high_exc <= threshold:
            held_by_istdp = True
    if weights.between == w_max:
        bg_end = population_rates(cfg, _with_within(cfg, weights, w_end, istdp), with_cue=False,
                                  active_hz=active_threshold_hz(cfg, bg))
        high_exc = np.nanmax([high_exc, bg_end.background_exc_hz])
        reasons.append(f"background at w_max: E {bg_end.background_exc_hz:.2f} Hz")
    if istdp and not (high_exc > threshold):
        held_by_istdp = True
    bounded = rule_bounded or held_by_istdp or not (high_exc > threshold)
    if rule_bounded:
        reasons.append("drift turns negative at high post rates (heterosynaptic term)")
    if held_by_istdp:
        reasons.append(f"inhibitory STDP can hold members near rho0 = {p['inhibitory']['rho0_hz']} Hz")
    outcome = "runaway" if high_exc > threshold else "stable"
    return Prediction(outcome, high_rate_bounded=bounded, reasons="; ".join(reasons), end_within_weight=w_end,
                      end_assembly_exc_hz=high_exc, **common)
