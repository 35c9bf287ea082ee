"""Shared fixtures: point configs of the demo network, a Poisson harness for the rules, a fresh build cache.

``point_config`` builds a nested point config from the registry defaults and overlays. The
Poisson harness runs capsweep's rules on independent Poisson pairs: each synapse connects its
own Poisson pre cell (rate ``rx``) to its own Poisson post cell (one of the post rates ``ry``),
so pre and post trains are independent and the mean weight drift can be compared with closed
forms for independent Poisson trains. Only the rule's plasticity statements run (no neurons, no
conductances). Brian2 is imported only when the harness runs, so tests without it stay light.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pytest

from capsweep.registry import defaults, nest
from capsweep.runners.builds import BUILD_DIR_ENV

if TYPE_CHECKING:
    import brian2 as b2

    from capsweep.runners.rules import Rule

DEMO_NETWORK: dict[str, object] = {
    "network.n_exc": 300,
    "assemblies.count": 3,
    "assemblies.size": 60,
    "plasticity.triplet.a_ltp": 0.03,
    "plasticity.triplet.b_ltd": 0.006,
    "protocol.settle_s": 1.0,
    "protocol.hold_s": 7.0,
}
"""The demo's small network (configs/demo.toml) with three prewired assemblies (dotted keys)."""
TRIPLET_ONLY: dict[str, object] = {
    "plasticity.heterosynaptic.enabled": False,
    "plasticity.transmitter.enabled": False,
    "plasticity.inhibitory.enabled": False,
}
"""Triplet STDP alone: the stabilising terms switched off (dotted keys)."""

TINY_LEARNED: dict[str, object] = {
    "network.n_exc": 100, "network.indegree_exc": 40, "network.indegree_inh": 10,
    "assemblies.count": 1, "assemblies.size": 25, "assemblies.imprint": "learned",
    "plasticity.heterosynaptic.w_ref_mode": "consolidating", "plasticity.heterosynaptic.tau_consolidation_s": 1.0,
    "protocol.settle_s": 0.3, "protocol.imprint_on_s": 0.3, "protocol.imprint_off_s": 0.2,
    "protocol.imprint_repeats": 1, "protocol.hold_s": 1.0, "protocol.cue_gap_s": 0.3,
    "detection.runaway_hold_s": 0.2, "detection.smoothing_s": 0.1,
}
"""A tiny learned point (dotted keys): 100 E cells, one assembly of 25 imprinted once, consolidating w_ref with
tau_cons = 1 s; settle 0.3, imprint 0.5, hold 1.0, one cue 0.2 + gap 0.3 (2.3 s)."""

ConfigFactory = Callable[..., dict]
DriftResult = dict[str, tuple[np.ndarray, np.ndarray]]


def _point_config(*overlays: dict[str, object], **changes: object) -> dict:
    """Nested config: registry defaults, then each overlay, then ``changes`` (all dotted keys)."""
    flat = defaults()
    for overlay in overlays:
        flat.update(overlay)
    flat.update(changes)
    return nest(flat)


def _poisson_drift(named_rules: dict[str, tuple[Rule, dict[str, float]]], rx_hz: float, ry_hz: Sequence[float],
                   n_syn: int, duration_s: float, dt: b2.Quantity, seed: int) -> DriftResult:
    """Mean drift (1/s) of ``w`` and its standard error, per post rate (Hz), for each named rule.

    ``named_rules`` maps a name to (rule, initial synapse state such as ``{"w": 50.0}``); the
    state must contain ``w``. All rules see the same ``n_syn`` pre/post pairs per post rate
    (runtime device, cython), pre cells fire at ``rx_hz`` (Hz), simulated for ``duration_s``
    seconds on a grid of ``dt`` (a Brian2 time).
    """
    import brian2 as b2

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


@pytest.fixture(scope="session")
def point_config() -> ConfigFactory:
    """``point_config(*overlays, **changes)``: nested config of registry defaults, then overlays, then changes.

    Overlays and changes use dotted keys (``"network.n_exc"``); values in the registry's units.
    """
    return _point_config


@pytest.fixture(scope="session")
def demo_network() -> dict[str, object]:
    """Dotted-key overlay of the demo's small network: 300 E cells, three prewired assemblies of 60, 11.1 s."""
    return dict(DEMO_NETWORK)


@pytest.fixture(scope="session")
def tiny_learned() -> dict[str, object]:
    """Dotted-key overlay of a tiny learned point (100 E cells, one assembly imprinted once, 2.3 s)."""
    return dict(TINY_LEARNED)


@pytest.fixture(scope="session")
def triplet_only() -> dict[str, object]:
    """Dotted-key overlay that switches the stabilising terms off (triplet STDP alone)."""
    return dict(TRIPLET_ONLY)


@pytest.fixture(scope="session")
def poisson_drift() -> Callable[..., DriftResult]:
    """The Poisson harness: ``poisson_drift(named_rules, rx_hz, ry_hz, n_syn, duration_s, dt, seed)``.

    Returns, per rule name, the mean drift of ``w`` (1/s) and its standard error per post rate.
    """
    return _poisson_drift


@pytest.fixture(scope="session")
def build_root(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A fresh standalone build cache for the session (``$CAPSWEEP_BUILD_DIR``): one compile per structure."""
    root = tmp_path_factory.mktemp("builds")
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv(BUILD_DIR_ENV, str(root))
        yield root
