"""Shared test helpers: point configs of the demo network, and a Poisson harness for the rules.

``point_config`` builds a nested point config from the registry defaults and overlays. The
Poisson harness runs capsweep's rules on independent Poisson pairs.

Each synapse connects its own Poisson pre cell (rate ``rx``) to its own Poisson post cell (one of
the post rates ``ry``), so pre and post trains are independent and the mean weight drift can be
compared with closed forms for independent Poisson trains. Only the rule's plasticity statements
run (no neurons, no conductances).
"""

from __future__ import annotations

from collections.abc import Sequence

import brian2 as b2
import numpy as np

from capsweep.runners import rules
from capsweep.registry import defaults, nest

DEMO_NETWORK = {
    "network.n_exc": 300,
    "assemblies.count": 3,
    "assemblies.size": 60,
    "plasticity.triplet.a_ltp": 0.03,
    "plasticity.triplet.b_ltd": 0.006,
    "protocol.settle_s": 1.0,
    "protocol.hold_s": 7.0,
}
"""The demo's small network (configs/demo.toml) with three prewired assemblies."""
TRIPLET_ONLY = {
    "plasticity.heterosynaptic.enabled": False,
    "plasticity.transmitter.enabled": False,
    "plasticity.inhibitory.enabled": False,
}
"""Triplet STDP alone: the stabilising terms switched off."""


def point_config(*overlays: dict[str, object], **changes: object) -> dict:
    """Nested config: registry defaults, then each overlay, then ``changes`` (all dotted keys)."""
    flat = defaults()
    for overlay in overlays:
        flat.update(overlay)
    flat.update(changes)
    return nest(flat)


def poisson_drift(named_rules: dict[str, tuple[rules.Rule, dict[str, float]]], rx_hz: float,
                  ry_hz: Sequence[float], n_syn: int, duration_s: float, dt: b2.Quantity,
                  seed: int) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Mean drift (1/s) of ``w`` and its standard error, per post rate, for each named rule.

    ``named_rules`` maps a name to (rule, initial synapse state such as ``{"w": 50.0}``); the
    state must contain ``w``. All rules see the same ``n_syn`` pre/post pairs per post rate
    (runtime device, cython), simulated for ``duration_s`` seconds on a grid of ``dt``.
    """
    b2.set_device("runtime")
    b2.prefs.codegen.target = "cython"
    b2.seed(seed)
    n = n_syn * len(ry_hz)
    pre = b2.PoissonGroup(n, rx_hz * b2.Hz, dt=dt, name="harness_pre")
    post = b2.PoissonGroup(n, np.repeat(np.asarray(ry_hz, dtype=float), n_syn) * b2.Hz, dt=dt, name="harness_post")
    synapses, namespace = {}, {}
    for name, (rule, state) in named_rules.items():
        syn = b2.Synapses(pre, post, rule.model, on_pre=rule.on_pre, on_post=rule.on_post or None,
                          name=f"harness_{name}", dt=dt)
        syn.connect(j="i")
        for variable, value in state.items():
            setattr(syn, variable, value)
        synapses[name] = syn
        namespace.update(rule.namespace)
    net = b2.Network(pre, post, *synapses.values())
    net.run(duration_s * b2.second, namespace=namespace)
    out = {}
    for name, syn in synapses.items():
        rate = (np.asarray(syn.w[:]) - named_rules[name][1]["w"]).reshape(len(ry_hz), n_syn) / duration_s
        out[name] = (rate.mean(axis=1), rate.std(axis=1, ddof=1) / np.sqrt(n_syn))
    return out
