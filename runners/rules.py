"""Synaptic plasticity rules as Brian2 model strings, built from a point's config.

Each builder returns a :class:`Rule`: the synapse ``model`` equations, the ``on_pre`` and
``on_post`` statements of the plasticity alone (no conductance update, so a test can attach
the rule to plain Poisson sources and targets) and the ``namespace`` of constants they use.
Weights ``w`` are dimensionless (units of the leak conductance).

E->E (``ee_rule``), each term switched by its ``enabled`` key:

- minimal triplet STDP (Pfister & Gerstner 2006): on a post spike
  ``w += A * z_plus * z_slow`` with the slow post trace read *before* its own increment;
  on a pre spike ``w -= B * z_minus``;
- heterosynaptic term (Zenke, Agnes & Gerstner 2015): on a post spike
  ``w -= beta * (w - w_ref) * z_minus**3`` (``z_minus`` read before its increment);
- transmitter-induced term: on a pre spike ``w += delta``;

all clipped to ``[0, w_max]``. ``w_ref`` is the synapse's initial weight (the builder sets it),
fixed or consolidating as ``tau_consolidation dw_ref/dt = w - w_ref`` (``consolidation_step``).

I->E (``ie_rule``): inhibitory STDP (Vogels et al. 2011): on a pre spike
``w += eta * (z_exc - alpha)``, on a post spike ``w += eta * z_inh``, ``alpha = 2 rho0 tau``,
clipped to ``[0, w_max]``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import brian2 as b2

CONSOLIDATION_DT_S = 0.1
"""Update interval (s) of the consolidating reference weight (tau_consolidation >= 0.1 s)."""


@dataclass(frozen=True)
class Rule:
    """Brian2 pieces of one plasticity rule."""

    model: str
    on_pre: str
    on_post: str
    namespace: dict[str, Any]


def _clip(expr: str, bound: str) -> str:
    return f"w = clip({expr}, 0, {bound})"


def ee_rule(cfg: dict) -> Rule:
    """E->E rule from ``cfg['plasticity']`` (triplet, heterosynaptic, transmitter sub-tables)."""
    p = cfg["plasticity"]
    tri, het, trans = p["triplet"], p["heterosynaptic"], p["transmitter"]
    model = [
        "w : 1",
        "w_ref : 1",
        "dz_plus/dt = -z_plus / tau_plus : 1 (event-driven)",
        "dz_minus/dt = -z_minus / tau_minus : 1 (event-driven)",
        "dz_slow/dt = -z_slow / tau_slow : 1 (event-driven)",
    ]
    pre_terms, post_terms = [], []
    if tri["enabled"]:
        pre_terms.append("- b_ltd * z_minus")
        post_terms.append("+ a_ltp * z_plus * z_slow")
    if trans["enabled"]:
        pre_terms.append("+ delta")
    if het["enabled"]:
        post_terms.append("- beta * (w - w_ref) * z_minus**3")
    on_pre = ["z_plus += 1"]
    if pre_terms:
        on_pre.append(_clip("w " + " ".join(pre_terms), "w_max"))
    on_post = [_clip("w " + " ".join(post_terms), "w_max")] if post_terms else []
    on_post += ["z_minus += 1", "z_slow += 1"]  # after the weight update: traces read before increment
    namespace = {
        "tau_plus": tri["tau_plus_ms"] * b2.ms,
        "tau_minus": tri["tau_minus_ms"] * b2.ms,
        "tau_slow": tri["tau_slow_ms"] * b2.ms,
        "a_ltp": tri["a_ltp"],
        "b_ltd": tri["b_ltd"],
        "w_max": tri["w_max"],
        "beta": het["beta"],
        "delta": trans["delta"],
        "tau_consolidation": het["tau_consolidation_s"] * b2.second,
        "consolidation_dt": CONSOLIDATION_DT_S * b2.second,
    }
    return Rule("\n".join(model), "\n".join(on_pre), "\n".join(on_post), namespace)


def consolidation_step(cfg: dict) -> str | None:
    """Statement that relaxes ``w_ref`` toward ``w``, or None when w_ref is fixed.

    It integrates ``tau_consolidation dw_ref/dt = w - w_ref`` exactly over one interval of
    CONSOLIDATION_DT_S seconds, holding ``w`` constant; run it with
    ``Synapses.run_regularly(statement, dt=CONSOLIDATION_DT_S * second)`` using the namespace
    of :func:`ee_rule`.
    """
    het = cfg["plasticity"]["heterosynaptic"]
    if het["w_ref_mode"] != "consolidating":
        return None
    return "w_ref += (w - w_ref) * (1 - exp(-consolidation_dt / tau_consolidation))"


def ie_rule(cfg: dict) -> Rule:
    """I->E inhibitory STDP from ``cfg['plasticity']['inhibitory']`` (static weight when disabled)."""
    inh = cfg["plasticity"]["inhibitory"]
    if not inh["enabled"]:
        return Rule("w : 1", "", "", {})
    model = "\n".join([
        "w : 1",
        "dz_inh/dt = -z_inh / tau_istdp : 1 (event-driven)",
        "dz_exc/dt = -z_exc / tau_istdp : 1 (event-driven)",
    ])
    on_pre = "z_inh += 1\n" + _clip("w + eta * (z_exc - alpha)", "w_max_inh")
    on_post = "z_exc += 1\n" + _clip("w + eta * z_inh", "w_max_inh")
    tau = inh["tau_ms"] * b2.ms
    namespace = {
        "tau_istdp": tau,
        "eta": inh["eta"],
        "alpha": 2 * inh["rho0_hz"] * inh["tau_ms"] * 1e-3,
        "w_max_inh": inh["w_max"],
    }
    return Rule(model, on_pre, on_post, namespace)

