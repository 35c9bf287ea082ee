"""Synaptic plasticity rules as Brian2 model strings, built from a point's config.

Each builder returns a :class:`Rule`: the synapse ``model`` equations, the ``on_pre`` and
``on_post`` statements of the plasticity alone (no conductance update, so a test can attach
the rule to plain Poisson sources and targets) and the ``namespace`` of constants they use.
Weights ``w`` are dimensionless (units of the leak conductance).

E->E (``ee_rule``), each term switched by its ``enabled`` key:

- minimal triplet STDP (Pfister & Gerstner 2006): on a post spike
  ``w += A * z_plus * z_slow`` with the slow post trace read *before* its own increment;
  on a pre spike ``w -= B * z_minus``;
- heterosynaptic term (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922): on a post spike the
  published ``dw = -beta * (w - w_ref) * z_minus**3`` (``z_minus`` read before its increment),
  integrated exactly over the spike as ``w <- w_ref + (w - w_ref) * exp(-beta * z_minus**3)``:
  equal to the published step to first order in ``beta * z_minus**3``, and it never overshoots
  ``w_ref`` (at member rates near 80 Hz with tau_minus = 33.7 ms, ``beta * z_minus**3`` exceeds 1
  for beta >= 0.03, where the linear step would flip the sign of ``w - w_ref``);
- order on a post spike: (1) the heterosynaptic relaxation of the weight the spike found,
  (2) plus this spike's triplet LTP, (3) the clip, (4) the increments of ``z_minus`` and
  ``z_slow``. Both terms read the traces before their increments (4), as the published rules
  do. The relaxation goes first because the published terms are both evaluated at the weight
  before the spike: relaxing first keeps this spike's LTP whole, whereas relaxing after it
  would shrink the LTP by ``exp(-beta * z_minus**3)``, a change of order beta*z^3 in the LTP
  itself that the published sum does not have (the two orders agree only to first order);
- transmitter-induced term: on a pre spike ``w += delta``;

all clipped to ``[0, w_max]``. ``w_ref`` starts at the synapse's initial weight (the builder sets
it) and is fixed, consolidating (``tau_consolidation dw_ref/dt = w - w_ref``) or bistable (the
published consolidation with two stable states); see :func:`consolidation_step`.

Every weight change (E->E and I->E) is multiplied by ``plastic = int(t < freeze_time)``: with
``plasticity.freeze_after_imprint`` the weights stop changing at the end of the imprint phase
(of settle, for prewired assemblies), the control that shows what ongoing plasticity does;
otherwise ``freeze_time`` lies beyond any run.

I->E (``ie_rule``): inhibitory STDP (Vogels et al. 2011, Science 334:1569): on a pre spike
``w += eta * (z_exc - alpha)``, on a post spike ``w += eta * z_inh``, ``alpha = 2 rho0 tau``,
clipped to ``[0, w_max]``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import brian2 as b2

from . import protocol

CONSOLIDATION_DT_S = 0.1
"""Update interval (s) of the consolidating reference weight (tau_consolidation >= 0.1 s)."""


@dataclass(frozen=True)
class Rule:
    """Brian2 pieces of one plasticity rule."""

    model: str
    on_pre: str
    on_post: str
    namespace: dict[str, Any]


NEVER_FROZEN_S = 1e12
"""``freeze_time`` (s) when plasticity never freezes: beyond any run."""
_GATE = "plastic = int(t < freeze_time)"


def freeze_time_s(cfg: dict) -> float:
    """:func:`capsweep.runners.protocol.freeze_time_s`, with "never" as a finite time beyond any run."""
    return min(protocol.freeze_time_s(cfg), NEVER_FROZEN_S)


def _clip(expr: str, bound: str) -> str:
    return f"w = clip({expr}, 0, {bound})"


def ee_rule(cfg: dict) -> Rule:
    """E->E rule from ``cfg['plasticity']`` (triplet, heterosynaptic, transmitter sub-tables).

    ``on_post`` relaxes ``w`` toward ``w_ref``, adds the triplet LTP, clips, then increments the
    post traces (order and reason: module docstring).
    """
    p = cfg["plasticity"]
    tri, het, trans = p["triplet"], p["heterosynaptic"], p["transmitter"]
    model = [
        "w : 1",
        "w_ref : 1",
        "dz_plus/dt = -z_plus / tau_plus : 1 (event-driven)",
        "dz_minus/dt = -z_minus / tau_minus : 1 (event-driven)",
        "dz_slow/dt = -z_slow / tau_slow : 1 (event-driven)",
    ]
    pre_terms, post = [], "w"
    if het["enabled"]:
        post = "w_ref + (w - w_ref) * exp(-plastic * beta * z_minus**3)"
    if tri["enabled"]:
        pre_terms.append("- b_ltd * z_minus")
        post += " + plastic * a_ltp * z_plus * z_slow"
    if trans["enabled"]:
        pre_terms.append("+ delta")
    on_pre = ["z_plus += 1"]
    if pre_terms:
        on_pre += [_GATE, _clip("w + plastic * (" + " ".join(pre_terms) + ")", "w_max")]
    on_post = [_GATE, _clip(post, "w_max")] if post != "w" else []
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
        "bistable_p": het["bistable_strength"],
        "bistable_wp": het["bistable_upper_weight"],
        "freeze_time": freeze_time_s(cfg) * b2.second,
    }
    return Rule("\n".join(model), "\n".join(on_pre), "\n".join(on_post), namespace)


def consolidation_step(cfg: dict) -> str | None:
    """Statement that moves ``w_ref`` toward ``w`` once per CONSOLIDATION_DT_S, or None when w_ref is fixed.

    Run it with ``Synapses.run_regularly(statement, dt=CONSOLIDATION_DT_S * second)`` using the
    namespace of :func:`ee_rule`; ``w`` is held constant over each interval. Modes
    (``plasticity.heterosynaptic.w_ref_mode``):

    - ``consolidating``: ``tau_consolidation dw_ref/dt = w - w_ref``, integrated exactly over the
      interval; ``w_ref`` follows any drift of ``w``.
    - ``bistable``: the consolidation of Zenke, Agnes & Gerstner 2015 (Nat Commun 6:6922, Methods,
      reference-weight dynamics; form and values [memory])::

          tau_consolidation dw_ref/dt = f(w_ref) = w - w_ref - P w_ref (w_P/2 - w_ref) (w_P - w_ref)

      with ``P = bistable_strength`` (1/g_leak**2) and ``w_P = bistable_upper_weight`` (g_leak).
      The cubic alone has stable states 0 and w_P and an unstable point w_P/2 [derived: its slope
      there is -P w_P**2/2, -P w_P**2/2 and +P w_P**2/4]; with ``w`` held, w_ref settles at the
      stable root of f on its side of the unstable root. Published values P = 20, w_P = 0.5 and
      tau_cons = 20 min [memory]; the registry keeps P w_P**2 = 5 at capsweep's weight scale.
      One step per interval, h = CONSOLIDATION_DT_S / tau_consolidation (at most 1)::

          w_ref += h f / (1 + h |f'|)

      the linearly implicit Euler step where f' < 0 (A-stable: at h = 1 it neither oscillates nor
      diverges), shrunk where f' > 0 near the unstable root. Its fixed points are exactly the roots
      of f, and a step never crosses the unstable root (steps point away from it; beyond the
      outer roots f is convex below / concave above, so a step shorter than Newton's stops short of
      the root) [derived; checked against scipy solve_ivp over w, w_ref in [0, 2 w_P],
      P w_P**2 from 5 to 1000 and h from 0.01 to 1]. To first order in h it is the explicit
      Euler step of the published equation.
    """
    mode = cfg["plasticity"]["heterosynaptic"]["w_ref_mode"]
    if mode == "consolidating":
        return "w_ref += (w - w_ref) * (1 - exp(-consolidation_dt / tau_consolidation))"
    if mode == "bistable":
        return "\n".join([
            "cons_h = consolidation_dt / tau_consolidation",
            "cons_f = w - w_ref - bistable_p * w_ref * (bistable_wp / 2 - w_ref) * (bistable_wp - w_ref)",
            "cons_slope = -1 - bistable_p * (3 * w_ref**2 - 3 * bistable_wp * w_ref + bistable_wp**2 / 2)",
            "w_ref += cons_h * cons_f / (1 + cons_h * abs(cons_slope))",
        ])
    return None


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
    on_pre = "\n".join(["z_inh += 1", _GATE, _clip("w + plastic * eta * (z_exc - alpha)", "w_max_inh")])
    on_post = "\n".join(["z_exc += 1", _GATE, _clip("w + plastic * eta * z_inh", "w_max_inh")])
    tau = inh["tau_ms"] * b2.ms
    namespace = {
        "tau_istdp": tau,
        "eta": inh["eta"],
        "alpha": 2 * inh["rho0_hz"] * inh["tau_ms"] * 1e-3,
        "w_max_inh": inh["w_max"],
        "freeze_time": freeze_time_s(cfg) * b2.second,
    }
    return Rule(model, on_pre, on_post, namespace)

