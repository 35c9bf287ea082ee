"""The Brian2 network of one point: E/I conductance LIF cells, plastic E->E and I->E synapses.

Every point is an explicit ``brian2.Network`` run with an explicit namespace (no magic
collection, no globals). Randomness drawn in numpy (``np.random.default_rng(seed)``):
assembly membership, cued members, fixed in-degree connectivity (passed as i/j arrays) and
initial membrane potentials; Brian2's own RNG (Poisson drive, stimulus sources) is seeded by
the caller with ``brian2.seed``. Stimuli (imprint and cue input) come from a 2-D TimedArray of
rates over (time, channel) that drives one Poisson source per (channel, target cell).

Neuron model (conductances in units of the leak conductance, dimensionless):
``tau_m dv/dt = (E_L - v) + g_e (E_exc - v) + g_i (E_inh - v) + g_a (E_inh - v)``; the
adaptation conductance ``g_a`` (E cells only) jumps by ``adapt_jump`` per spike, decays with
``adapt_tau_ms`` and reverses at ``e_inh_mv`` (potassium-like, -80 mV by default).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import brian2 as b2
import numpy as np

from runners import protocol, rules
from sweeps.errors import ConfigError

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


def draw_assemblies(cfg: dict, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Boolean membership and cued-member matrices, each (count, n_exc).

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
    order = rng.permutation(n_exc)
    for k in range(count):
        idx = order[k * size:(k + 1) * size] if a["overlap"] == "disjoint" else rng.choice(n_exc, size, replace=False)
        members[k, idx] = True
        cued[k, rng.permutation(idx)[:n_cued]] = True
    return members, cued


def fixed_indegree(n_pre: int, n_post: int, k: int, rng: np.random.Generator, *, no_self: bool) -> tuple[np.ndarray, np.ndarray]:
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


def _namespace(cfg: dict) -> dict[str, Any]:
    n = cfg["network"]
    mv, ms = b2.mV, b2.ms
    return {
        "e_leak": n["e_leak_mv"] * mv, "e_exc": n["e_exc_mv"] * mv, "e_inh": n["e_inh_mv"] * mv,
        "v_threshold": n["v_threshold_mv"] * mv, "v_reset": n["v_reset_mv"] * mv,
        "tau_m": n["tau_m_ms"] * ms, "tau_exc": n["tau_exc_ms"] * ms, "tau_inh": n["tau_inh_ms"] * ms,
        "tau_adapt": n["adapt_tau_ms"] * ms, "adapt_jump": n["adapt_jump"],
        "w_e_to_i": n["w_e_to_i"], "w_i_to_i": n["w_i_to_i"],
    }


def _neurons(cfg: dict, n: int, adaptive: bool, rng: np.random.Generator) -> b2.NeuronGroup:
    net = cfg["network"]
    eqs = _NEURON.format(adapt_term=" + g_a * (e_inh - v)" if adaptive else "",
                         adapt_eq="dg_a/dt = -g_a / tau_adapt : 1" if adaptive else "")
    refractory = (net["refractory_exc_ms"] if adaptive else net["refractory_inh_ms"]) * b2.ms
    group = b2.NeuronGroup(n, eqs, threshold="v > v_threshold",
                           reset="v = v_reset" + ("\ng_a += adapt_jump" if adaptive else ""),
                           refractory=refractory, method="euler", name="exc" if adaptive else "inh")
    group.v = (net["v_reset_mv"] + rng.random(n) * (net["v_threshold_mv"] - net["v_reset_mv"])) * b2.mV
    return group


def _synapses(src, tgt, rule: rules.Rule, transmit: str, i, j, delay, name: str) -> b2.Synapses:
    on_pre = transmit + ("\n" + rule.on_pre if rule.on_pre else "")
    syn = b2.Synapses(src, tgt, model=rule.model, on_pre=on_pre, on_post=rule.on_post or None,
                      delay=delay, method="euler", name=name)
    syn.connect(i=i, j=j)
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


def build_network(cfg: dict, seed: int) -> tuple[b2.Network, dict[str, Any], Handles]:
    """Build the point's network; run it with ``net.run(duration, namespace=namespace)``.

    The caller seeds Brian2's RNG (``brian2.seed``) and selects the code generation target.
    Raises ConfigError when assemblies or in-degrees do not fit the network.
    """
    net_cfg = cfg["network"]
    rng = np.random.default_rng(seed)
    n_exc = net_cfg["n_exc"]
    n_inh = max(1, int(round(n_exc * net_cfg["inh_per_exc"])))
    memberships, cued = draw_assemblies(cfg, rng)
    sched = protocol.schedule(cfg)
    ns = _namespace(cfg)
    exc, inh = _neurons(cfg, n_exc, True, rng), _neurons(cfg, n_inh, False, rng)
    delay = net_cfg["delay_ms"] * b2.ms
    k_e, k_i = net_cfg["indegree_exc"], net_cfg["indegree_inh"]

    ee, ie = rules.ee_rule(cfg), rules.ie_rule(cfg)
    ns.update(ee.namespace)
    ns.update(ie.namespace)
    i_ee, j_ee = fixed_indegree(n_exc, n_exc, k_e, rng, no_self=True)
    s_ee = _synapses(exc, exc, ee, "g_e_post += w", i_ee, j_ee, delay, "ee")
    within = (memberships[:, i_ee] & memberships[:, j_ee]).any(axis=0)
    prewired = cfg["assemblies"]["imprint"] == "prewired"
    w0 = net_cfg["w_e_to_e"] * np.where(within & prewired, cfg["assemblies"]["prewire_gain"], 1.0)
    s_ee.w = w0
    s_ee.w_ref = w0
    consolidation = rules.consolidation_step(cfg)
    if consolidation:
        s_ee.run_regularly(consolidation, dt=rules.CONSOLIDATION_DT_S * b2.second)

    i_ie, j_ie = fixed_indegree(n_inh, n_exc, k_i, rng, no_self=False)
    s_ie = _synapses(inh, exc, ie, "g_i_post += w", i_ie, j_ie, delay, "ie")
    s_ie.w = net_cfg["w_i_to_e"]
    static = rules.Rule("", "", "", {})
    i_ei, j_ei = fixed_indegree(n_exc, n_inh, k_e, rng, no_self=False)
    s_ei = _synapses(exc, inh, static, "g_e_post += w_e_to_i", i_ei, j_ei, delay, "ei")
    i_ii, j_ii = fixed_indegree(n_inh, n_inh, k_i, rng, no_self=True)
    s_ii = _synapses(inh, inh, static, "g_i_post += w_i_to_i", i_ii, j_ii, delay, "ii")

    objects: list[b2.BrianObject] = [exc, inh, s_ee, s_ie, s_ei, s_ii]
    if net_cfg["drive_inputs"] > 0:
        for group, rate in ((exc, net_cfg["drive_rate_exc_hz"]), (inh, net_cfg["drive_rate_inh_hz"])):
            objects.append(b2.PoissonInput(group, "g_e", net_cfg["drive_inputs"], rate * b2.Hz,
                                           weight=net_cfg["drive_weight"]))
    objects += _stimulus(cfg, exc, memberships, cued, sched, ns)
    mon_exc, mon_inh = b2.SpikeMonitor(exc, name="spikes_exc"), b2.SpikeMonitor(inh, name="spikes_inh")
    objects += [mon_exc, mon_inh]
    network = b2.Network(*objects)
    n_syn = len(i_ee) + len(i_ie) + len(i_ei) + len(i_ii)
    handles = Handles(exc, inh, s_ee, mon_exc, mon_inh, memberships, cued, within, n_syn, sched)
    return network, ns, handles
