"""The Brian2 network of one point: E/I conductance LIF cells, plastic E->E and I->E synapses.

Every point is an explicit ``brian2.Network`` run with an explicit namespace (no magic
collection, no globals). Randomness drawn in numpy: the *wiring* stream (from ``wiring_seed``)
gives assembly membership and the fixed in-degree connectivity (passed as i/j arrays), the
*point* stream (from ``seed``) gives cued members and initial membrane potentials (without a
wiring seed, one stream from ``seed`` gives all of them); Brian2's own
RNG (Poisson drive, stimulus sources) is seeded by the caller. Stimuli (imprint and cue input)
come from a 2-D TimedArray of rates over (time, channel) that drives one Poisson source per
(channel, target cell).

With ``standalone=True`` (C++ standalone with build reuse, see :mod:`capsweep.runners.standalone`) every
constant becomes a ``(shared, constant)`` variable and every array value a setting that the
caller passes per run; the background drive is a per-step Poisson count with a variable mean
(:func:`_drive_count`), and the standalone engine adds the stimulus (per-step kicks onto the
driven cells only, whose timing and targets a C++ function reads per run).

Neuron model (conductances in units of the leak conductance, dimensionless):
``tau_m dv/dt = (E_L - v) + g_e (E_exc - v) + g_i (E_inh - v) + g_a (E_inh - v)``; the
adaptation conductance ``g_a`` (E cells only) jumps by ``adapt_jump`` per spike, decays with
``adapt_tau_ms`` and reverses at ``e_inh_mv`` (potassium-like, -80 mV by default).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import brian2 as b2
import numpy as np

from ..errors import ConfigError
from ..registry import inhibitory_count
from . import protocol, rules

_NEURON = """
dv/dt = (e_leak - v + g_e * (e_exc - v) + g_i * (e_inh - v){adapt_term}) / tau_m : volt (unless refractory)
dg_e/dt = -g_e / tau_exc : 1
dg_i/dt = -g_i / tau_inh : 1
{adapt_eq}"""


@dataclass
class Handles:
    """Objects and arrays of a built network that the point runner reads."""

    exc: b2.NeuronGroup
    inh: b2.NeuronGroup
    s_ee: b2.Synapses
    mon_exc: b2.SpikeMonitor
    mon_inh: b2.SpikeMonitor
    memberships: np.ndarray  # bool (count, n_exc)
    cued: np.ndarray  # bool (count, n_exc)
    within: np.ndarray  # bool per E->E synapse: pre and post share an assembly
    n_synapses: int
    schedule: protocol.Schedule
    settings: list[tuple[Any, str, Any]] = field(default_factory=list)  # (group, variable, value)
    wiring: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)  # synapses name -> (i, j)


def draw_assemblies(cfg: dict, wiring: np.random.Generator, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Boolean membership (from the ``wiring`` stream) and cued-member (from ``rng``) matrices, each (count, n_exc).

    Raises ConfigError if the assemblies do not fit.
    """
    a, n_exc = cfg["assemblies"], cfg["network"]["n_exc"]
    count, size = a["count"], a["size"]
    if size > n_exc:
        raise ConfigError(f"assemblies.size = {size} exceeds network.n_exc = {n_exc}")
    if a["overlap"] == "disjoint" and count * size > n_exc:
        raise ConfigError(
            f"disjoint assemblies do not fit: assemblies.count = {count} x assemblies.size = {size}"
            f" = {count * size} > network.n_exc = {n_exc}")
    n_cued = max(1, int(round(cfg["protocol"]["cue_fraction"] * size)))
    members = np.zeros((count, n_exc), dtype=bool)
    cued = np.zeros((count, n_exc), dtype=bool)
    order = wiring.permutation(n_exc)
    for k in range(count):
        disjoint = a["overlap"] == "disjoint"
        idx = order[k * size:(k + 1) * size] if disjoint else wiring.choice(n_exc, size, replace=False)
        members[k, idx] = True
        cued[k, rng.permutation(idx)[:n_cued]] = True
    return members, cued


def fixed_indegree(n_pre: int, n_post: int, k: int, rng: np.random.Generator, *,
                   no_self: bool) -> tuple[np.ndarray, np.ndarray]:
    """(i, j) arrays: each post cell gets ``k`` distinct random pre cells (never itself if ``no_self``)."""
    pool = n_pre - 1 if no_self else n_pre
    if k > pool:
        raise ConfigError(f"in-degree {k} exceeds the {pool} available presynaptic cells"
                          " (network.indegree_exc / network.indegree_inh vs network.n_exc)")
    pre = np.argsort(rng.random((n_post, pool)), axis=1)[:, :k] if n_post * pool <= 4_000_000 else \
        np.stack([rng.choice(pool, k, replace=False) for _ in range(n_post)])
    post = np.repeat(np.arange(n_post), k)
    pre = pre.ravel()
    if no_self:
        pre = pre + (pre >= post)
    return pre, post


_DIMENSION_NAMES = {b2.second.dim: "second", b2.volt.dim: "volt", b2.Hz.dim: "Hz"}


def _unit_name(value: Any) -> str:
    """Unit string of ``value`` for a Brian2 equation ('1' for plain numbers)."""
    dim = b2.get_dimensions(value)
    return "1" if dim.is_dimensionless else _DIMENSION_NAMES[dim]


class _Constants:
    """Where a point's values go: into the run namespace and object state now (runtime), or into
    ``(shared, constant)`` variables and per-run settings (standalone, set with ``run_args``)."""

    def __init__(self, standalone: bool) -> None:
        self.standalone = standalone
        self.namespace: dict[str, Any] = {}
        self.settings: list[tuple[Any, str, Any]] = []

    def declare(self, values: dict[str, Any]) -> str:
        """Equation lines declaring ``values`` as shared variables (standalone); '' in runtime."""
        if not self.standalone:
            self.namespace.update(values)
            return ""
        integer = {name for name, v in values.items() if isinstance(v, (int, np.integer)) and not isinstance(v, bool)}
        return "".join(f"\n{name} : {'integer' if name in integer else _unit_name(v)} (shared, constant)"
                       for name, v in values.items())

    def bind(self, group: Any, values: dict[str, Any]) -> None:
        """Record the values of variables declared with :meth:`declare` on ``group`` (standalone)."""
        if self.standalone:
            self.settings += [(group, name, value) for name, value in values.items()]

    def set(self, group: Any, name: str, value: Any) -> None:
        """Initial state of ``group.name``: assigned now (runtime) or recorded for the run (standalone)."""
        if self.standalone:
            self.settings.append((group, name, value))
        else:
            setattr(group, name, value)


def _neuron_constants(cfg: dict, adaptive: bool) -> dict[str, Any]:
    n = cfg["network"]
    mv, ms = b2.mV, b2.ms
    values = {
        "e_leak": n["e_leak_mv"] * mv, "e_exc": n["e_exc_mv"] * mv, "e_inh": n["e_inh_mv"] * mv,
        "v_threshold": n["v_threshold_mv"] * mv, "v_reset": n["v_reset_mv"] * mv,
        "tau_m": n["tau_m_ms"] * ms, "tau_exc": n["tau_exc_ms"] * ms, "tau_inh": n["tau_inh_ms"] * ms,
    }
    if adaptive:
        values.update(tau_adapt=n["adapt_tau_ms"] * ms, adapt_jump=n["adapt_jump"])
    return values


def _drive_constants(cfg: dict, adaptive: bool) -> dict[str, Any]:
    """Mean background input count per step and its weight (standalone drive)."""
    n = cfg["network"]
    rate = n["drive_rate_exc_hz"] if adaptive else n["drive_rate_inh_hz"]
    return {"drive_mean": n["drive_inputs"] * rate * n["dt_ms"] * 1e-3, "drive_weight": n["drive_weight"]}


DRIVE_FUNCTION = "capsweep_drive_count"
"""Name of the standalone drive's C++ function ``(mean, exp(-mean)) -> Poisson count`` (one draw per cell and step)."""

_DRIVE_CODE = """
// A Poisson count of mean lam, by inversion of one uniform draw; p0 = exp(-lam), hoisted out of the
// loop over cells by Brian2 (lam is a shared constant). Brian2's poisson() recomputes exp(-lam) per call.
int32_t DRIVE_NAME(double lam, double p0, int _vectorisation_idx) {
    if (lam >= 10) return _poisson(lam, _vectorisation_idx);
    const double u = _rand(_vectorisation_idx);
    double p = p0, cdf = p0;
    int32_t k = 0;
    while (u > cdf && p > 0) { k++; p *= lam / k; cdf += p; }
    return k;
}
"""


def _drive_count() -> b2.Function:
    """The C++ function :data:`DRIVE_FUNCTION`: one Poisson count per call, the same law as ``poisson(lam)``.

    Counts of mean below 10 come from one uniform draw by inversion (the cumulative sum of
    ``p0 lam^k / k!`` up to the draw); larger means go to Brian2's own ``poisson``.
    """
    from brian2.core.functions import DEFAULT_FUNCTIONS

    fn = b2.Function(lambda lam, p0: 0, arg_units=[1, 1], return_unit=1, arg_types=["float", "float"],
                     return_type="integer", stateless=False, auto_vectorise=True)
    fn.implementations.add_implementation(
        "cpp", _DRIVE_CODE.replace("DRIVE_NAME", DRIVE_FUNCTION), name=DRIVE_FUNCTION,
        dependencies={"_rand": DEFAULT_FUNCTIONS["rand"], "_poisson": DEFAULT_FUNCTIONS["poisson"]})
    return fn


def _neurons(cfg: dict, n: int, adaptive: bool, rng: np.random.Generator, const: _Constants) -> b2.NeuronGroup:
    net = cfg["network"]
    values = _neuron_constants(cfg, adaptive)
    refractory = (net["refractory_exc_ms"] if adaptive else net["refractory_inh_ms"]) * b2.ms
    if const.standalone:
        values.update(_drive_constants(cfg, adaptive), refractory_period=refractory)
        if adaptive:
            values.update(_stimulus_constants(cfg))
    eqs = _NEURON.format(adapt_term=" + g_a * (e_inh - v)" if adaptive else "",
                         adapt_eq="dg_a/dt = -g_a / tau_adapt : 1" if adaptive else "") + const.declare(values)
    group = b2.NeuronGroup(n, eqs, threshold="v > v_threshold",
                           reset="v = v_reset" + ("\ng_a += adapt_jump" if adaptive else ""),
                           refractory="refractory_period" if const.standalone else refractory,
                           method="euler", name="exc" if adaptive else "inh")
    const.bind(group, values)
    if const.standalone:
        const.namespace[DRIVE_FUNCTION] = _drive_count()
        group.run_regularly(f"g_e += drive_weight * {DRIVE_FUNCTION}(drive_mean, exp(-drive_mean))", when="synapses",
                            name=f"{group.name}_drive")
    const.set(group, "v", (net["v_reset_mv"] + rng.random(n) * (net["v_threshold_mv"] - net["v_reset_mv"])) * b2.mV)
    return group


def _synapses(src, tgt, rule: rules.Rule, transmit: str, i, j, delay, name: str, const: _Constants,
              constants: dict[str, Any], extra_model: str = "") -> b2.Synapses:
    values = {**rule.namespace, **constants}
    on_pre = transmit + ("\n" + rule.on_pre if rule.on_pre else "")
    syn = b2.Synapses(src, tgt, model=rule.model + extra_model + const.declare(values), on_pre=on_pre,
                      on_post=rule.on_post or None, delay=delay, method="euler", name=name)
    syn.connect(i=i, j=j)
    const.bind(syn, values)
    return syn


def _stimulus(cfg: dict, exc: b2.NeuronGroup, memberships: np.ndarray, cued: np.ndarray,
              sched: protocol.Schedule, ns: dict[str, Any]) -> list[b2.BrianObject]:
    """Poisson sources (one per channel and target) driven by the rate TimedArray ``stim``."""
    count, pr = len(memberships), cfg["protocol"]
    learned = cfg["assemblies"]["imprint"] == "learned"
    chans, targets, weights = [], [], []
    for k in range(count):
        for channel, mask, weight, use in ((k, memberships[k], pr["imprint_weight"], learned),
                                           (count + k, cued[k], pr["cue_weight"], True)):
            if use:
                idx = np.flatnonzero(mask)
                chans.append(np.full(len(idx), channel))
                targets.append(idx)
                weights.append(np.full(len(idx), weight))
    if not chans:
        return []
    table, row = protocol.stimulus_table(cfg, sched)
    ns["stim"] = b2.TimedArray(table * b2.Hz, dt=row * sched.dt_s * b2.second)
    channel = np.concatenate(chans)
    src = b2.NeuronGroup(len(channel), "channel : integer (constant)",
                         threshold="rand() < stim(t, channel) * dt", name="stim_sources")
    src.channel = channel
    syn = b2.Synapses(src, exc, "w_stim : 1 (constant)", on_pre="g_e_post += w_stim", name="stim_synapses")
    syn.connect(i=np.arange(len(channel)), j=np.concatenate(targets))
    syn.w_stim = np.concatenate(weights)
    return [src, syn]


def _stimulus_constants(cfg: dict) -> dict[str, Any]:
    """Rates and weights of the imprint and cue input (standalone: shared constants of the E group)."""
    pr = cfg["protocol"]
    return {"imprint_rate": pr["imprint_rate_hz"] * b2.Hz, "cue_rate": pr["cue_rate_hz"] * b2.Hz,
            "imprint_weight": pr["imprint_weight"], "cue_weight": pr["cue_weight"]}


SNAPSHOT_VARIABLE = "w_snap{}"
"""Per-synapse E->E copies of ``w`` (standalone): index 0 at imprint end, ``1 + s`` at hold snapshot ``s``."""
REF_SNAPSHOT_VARIABLE = "w_ref_snap{}"
"""Per-synapse E->E copies of ``w_ref`` (standalone, :func:`records_w_ref`): index ``s`` at hold snapshot ``s``."""


def records_w_ref(cfg: dict) -> bool:
    """True if the reference weight moves (w_ref_mode not fixed), so the engines record it at each hold snapshot."""
    return bool(cfg["plasticity"]["heterosynaptic"]["w_ref_mode"] != "fixed")


def reference_start(cfg: dict, w0: np.ndarray) -> np.ndarray:
    """Starting reference weight (g_leak) of E->E synapses with initial weights ``w0``
    (``plasticity.heterosynaptic.w_ref_start``): ``w0``, or the lower stable state 0 of the bistable
    consolidation, where the published model starts it (Ziegler, Zenke, Kastner & Gerstner 2015,
    J Neurosci 35:1319; Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922, Methods)."""
    return np.zeros_like(w0) if cfg["plasticity"]["heterosynaptic"]["w_ref_start"] == "lower" else w0


def build_network(cfg: dict, seed: int, wiring_seed: int | None = None, *,
                  standalone: bool = False) -> tuple[b2.Network, dict[str, Any], Handles]:
    """Build the point's network; run it with ``net.run(duration, namespace=namespace)``.

    ``wiring_seed`` draws membership and connectivity, ``seed`` everything else drawn in numpy
    (cued members, initial voltages); without ``wiring_seed`` one stream from ``seed`` draws all.
    The caller seeds Brian2's RNG and selects the device / code generation
    target. With ``standalone`` the point's values are in ``handles.settings`` (pass them as
    ``run_args``), not yet in the objects. Raises ConfigError when assemblies or in-degrees do
    not fit the network.
    """
    net_cfg = cfg["network"]
    if wiring_seed is None:  # one stream for everything, as before wiring seeds existed
        wiring = rng = np.random.default_rng(seed)
    else:
        wiring, rng = np.random.default_rng([wiring_seed, 1]), np.random.default_rng([seed, 0])
    const = _Constants(standalone)
    b2.defaultclock.dt = net_cfg["dt_ms"] * b2.ms
    n_exc = net_cfg["n_exc"]
    n_inh = inhibitory_count(n_exc, net_cfg["inh_per_exc"])
    memberships, cued = draw_assemblies(cfg, wiring, rng)
    sched = protocol.schedule(cfg, protocol.cue_order(cfg["assemblies"]["count"], seed))
    exc, inh = _neurons(cfg, n_exc, True, rng, const), _neurons(cfg, n_inh, False, rng, const)
    delay = net_cfg["delay_ms"] * b2.ms
    k_e, k_i = net_cfg["indegree_exc"], net_cfg["indegree_inh"]

    ee, ie = rules.ee_rule(cfg), rules.ie_rule(cfg)
    snap_model = "".join(f"\n{SNAPSHOT_VARIABLE.format(s)} : 1" for s in range(len(sched.snapshots) + 1)) \
        if standalone else ""
    if standalone and records_w_ref(cfg):
        snap_model += "".join(f"\n{REF_SNAPSHOT_VARIABLE.format(s)} : 1" for s in range(len(sched.snapshots)))
    i_ee, j_ee = fixed_indegree(n_exc, n_exc, k_e, wiring, no_self=True)
    s_ee = _synapses(exc, exc, ee, "g_e_post += w", i_ee, j_ee, delay, "ee", const, {}, snap_model)
    within = (memberships[:, i_ee] & memberships[:, j_ee]).any(axis=0)
    prewired = cfg["assemblies"]["imprint"] == "prewired"
    w0 = net_cfg["w_e_to_e"] * np.where(within & prewired, cfg["assemblies"]["prewire_gain"], 1.0)
    const.set(s_ee, "w", w0)
    const.set(s_ee, "w_ref", reference_start(cfg, w0))
    consolidation = rules.consolidation_step(cfg)
    if consolidation:
        s_ee.run_regularly(consolidation, dt=rules.CONSOLIDATION_DT_S * b2.second, name="ee_consolidation")

    i_ie, j_ie = fixed_indegree(n_inh, n_exc, k_i, wiring, no_self=False)
    s_ie = _synapses(inh, exc, ie, "g_i_post += w", i_ie, j_ie, delay, "ie", const, {})
    const.set(s_ie, "w", net_cfg["w_i_to_e"] * np.ones(len(i_ie)))
    static = rules.Rule("", "", "", {})
    i_ei, j_ei = fixed_indegree(n_exc, n_inh, k_e, wiring, no_self=False)
    s_ei = _synapses(exc, inh, static, "g_e_post += w_e_to_i", i_ei, j_ei, delay, "ei", const,
                     {"w_e_to_i": net_cfg["w_e_to_i"]})
    i_ii, j_ii = fixed_indegree(n_inh, n_inh, k_i, wiring, no_self=True)
    s_ii = _synapses(inh, inh, static, "g_i_post += w_i_to_i", i_ii, j_ii, delay, "ii", const,
                     {"w_i_to_i": net_cfg["w_i_to_i"]})

    objects: list[b2.BrianObject] = [exc, inh, s_ee, s_ie, s_ei, s_ii]
    if not standalone:
        if net_cfg["drive_inputs"] > 0:
            for group, rate in ((exc, net_cfg["drive_rate_exc_hz"]), (inh, net_cfg["drive_rate_inh_hz"])):
                objects.append(b2.PoissonInput(group, "g_e", net_cfg["drive_inputs"], rate * b2.Hz,
                                               weight=net_cfg["drive_weight"]))
        objects += _stimulus(cfg, exc, memberships, cued, sched, const.namespace)
    mon_exc, mon_inh = b2.SpikeMonitor(exc, name="spikes_exc"), b2.SpikeMonitor(inh, name="spikes_inh")
    objects += [mon_exc, mon_inh]
    # Named, not auto-named: Brian2 numbers auto-names by the instances alive at the time
    # (network, network_1, ...), which would make the standalone code, and so the need to
    # recompile it, depend on what a process built before and when its garbage was collected.
    network = b2.Network(*objects, name="capsweep_network")
    n_syn = len(i_ee) + len(i_ie) + len(i_ei) + len(i_ii)
    pathways = {"ee": (i_ee, j_ee), "ie": (i_ie, j_ie), "ei": (i_ei, j_ei), "ii": (i_ii, j_ii)}
    handles = Handles(exc, inh, s_ee, mon_exc, mon_inh, memberships, cued, within, n_syn, sched, const.settings,
                      pathways)
    return network, const.namespace, handles
