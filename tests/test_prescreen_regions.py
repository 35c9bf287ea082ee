"""The time-resolved prescreen: rate forms against closed forms and the simulated rules, and a verdict that
follows parameters the former prescreens ignored, as simulation does.

The first prescreen called every point with inhibitory STDP on "stable", whatever its learning rate (it assumed
inhibition onto members reaches its cap); the second called every point of the beta region "stable" (its mean
field has no self-sustained assembly state there). Now the I->E weights move at the rate the rule gives, and the
runaway chance of the link (capsweep.runners.theory.link) grows with the count and falls with beta, as the
simulated outcome does.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

from capsweep.registry import BY_PATH, KEYS, Key
from capsweep.runners.point import run_point
from capsweep.runners.theory import drift, dynamics
from capsweep.runners.theory.prediction import predict
from capsweep.sweeps.expand import expand
from capsweep.sweeps.success import capacity_of
from capsweep.sweeps.sweepfile import load_sweep

CONFIGS = Path(__file__).resolve().parent.parent / "configs"

TRIPLET_WITH_ISTDP = {"plasticity.heterosynaptic.enabled": False, "plasticity.transmitter.enabled": False}


@pytest.mark.reference
@pytest.mark.slow  # 51 s of simulation
def test_inhibitory_rate_form_matches_the_simulated_rule(point_config, poisson_drift) -> None:
    """Vogels et al. 2011 (Science 334:1569): for independent Poisson trains the rule's mean drift is
    2 eta tau r_pre (r_post - rho0) [derived: E[z_exc] = r_post tau, E[z_inh] = r_pre tau], zero at rho0."""
    import brian2 as b2

    from capsweep.runners.rules import ie_rule

    cfg = point_config(**{"plasticity.inhibitory.eta": 1e-3, "plasticity.inhibitory.w_max": 100.0})
    inh = cfg["plasticity"]["inhibitory"]
    r_pre, posts = 10.0, [1.0, inh["rho0_hz"], 12.0]
    measured, sem = poisson_drift({"ie": (ie_rule(cfg), {"w": 50.0})}, r_pre, posts, 300, 10.0, 0.1 * b2.ms, 3)["ie"]
    closed = [2 * inh["eta"] * inh["tau_ms"] * 1e-3 * r_pre * (r - inh["rho0_hz"]) for r in posts]
    assert closed[1] == 0.0  # fixed point at the target rate
    for got, err, want, r in zip(measured, sem, closed, posts):
        assert drift.inhibitory_drift(cfg, r_pre, r) == pytest.approx(want, rel=1e-12, abs=1e-15)
        assert abs(got - want) < 4 * err + 1e-4 * abs(want), (r, got, want, err)
    assert measured[0] < 0 < measured[2]  # below rho0 inhibition weakens, above it strengthens
    off = point_config(**{"plasticity.inhibitory.enabled": False})
    assert drift.inhibitory_drift(off, r_pre, 12.0) == 0.0


def _trace_before_spikes(rate_hz: float, tau_s: float, n: int, seed: int) -> np.ndarray:
    """Values of an exponential trace (jump 1, decay tau) just before each of n Poisson spikes [derived]."""
    gaps = np.random.default_rng(seed).exponential(1.0 / rate_hz, n)
    z, out = 0.0, np.empty(n)
    for i, gap in enumerate(gaps):
        z *= math.exp(-gap / tau_s)
        out[i] = z
        z += 1.0
    return out


@pytest.mark.reference
def test_heterosynaptic_step_saturates_as_the_simulated_exponential_step() -> None:
    """The simulated step multiplies w - w_ref by exp(-beta z^3) per post spike (capsweep.runners.rules);
    its mean is E[1 - exp(-beta z^3)], checked against a Monte Carlo of the trace before Poisson spikes.
    For small beta it is the published beta E[z^3] (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922), with
    E[z^3] = x^3 + 1.5 x^2 + x/3, x = r tau (shot-noise cumulants r tau / n) [derived]."""
    tau = 33.7e-3
    for rate, beta in ((20.0, 0.03), (80.0, 0.03), (80.0, 1.0), (5.0, 1.0)):
        z = _trace_before_spikes(rate, tau, 100_000, 1)
        sampled = float(np.mean(-np.expm1(-beta * z**3)))
        assert drift.relaxation_per_spike(beta, rate, tau) == pytest.approx(sampled, rel=0.08), (rate, beta)
    x = 10.0 * tau
    assert drift.relaxation_per_spike(1e-6, 10.0, tau) == pytest.approx(1e-6 * (x**3 + 1.5 * x**2 + x / 3), rel=1e-4)
    assert drift.relaxation_per_spike(10.0, 200.0, tau) <= 1.0  # never more than the whole difference


@pytest.mark.reference
def test_integrated_weight_reaches_the_drift_zero(point_config) -> None:
    """At fixed rates the E->E drift is c - k (w - w_ref); integrating it must end at w_ref + c/k [derived], with
    c from the triplet and transmitter terms (Pfister & Gerstner 2006 J Neurosci 26:9673 minimal rule) and
    k = beta ry E[z^3] (small beta: the published first-order form); ``weight_equilibrium`` names the same zero."""
    cfg = point_config(**{"plasticity.heterosynaptic.beta": 1e-4, "plasticity.triplet.w_max": 100.0})
    tri, delta, beta = cfg["plasticity"]["triplet"], cfg["plasticity"]["transmitter"]["delta"], 1e-4
    rx, ry, w_ref = 10.0, 30.0, 0.05
    tp, tm, ts = tri["tau_plus_ms"] * 1e-3, tri["tau_minus_ms"] * 1e-3, tri["tau_slow_ms"] * 1e-3
    c = tri["a_ltp"] * tp * ts * rx * ry**2 - tri["b_ltd"] * tm * rx * ry + delta * rx
    x = ry * tm
    k = beta * ry * (x**3 + 1.5 * x**2 + x / 3)
    w_star = w_ref + c / k
    w = np.array([w_ref, 3 * w_star])  # from below and from above
    c_got, k_got = drift.linear_drift(cfg, rx, ry, w_ref)
    for _ in range(400):
        w = drift.relax(w, c_got, k_got, w_ref, 1.0 / k, tri["w_max"])
    # beta z^3 ~ 1e-3 here: the simulated step's saturation moves the zero by less than 0.5 % [derived]
    assert w == pytest.approx([w_star, w_star], rel=5e-3)
    assert w[0] == pytest.approx(drift.weight_equilibrium(cfg, rx, ry, w_ref), rel=1e-9)


def test_capacity_is_the_run_of_successes_from_the_smallest_count() -> None:
    # the capacity definition of capsweep.sweeps.capacity, applied to predictions [common practice]
    assert capacity_of([1, 2, 3, 4], [True, True, False, True]) == 2
    assert capacity_of([1, 2], [False, True]) == 0
    assert capacity_of([1, 2], [True, True]) == 2
    assert capacity_of([1, 2, 3], [True, None, True]) == 1  # an undecided count ends the run too


def test_verdict_follows_the_inhibitory_learning_rate_as_simulation_does(point_config, demo_network) -> None:
    """One prewired odour assembly under triplet STDP with inhibitory STDP (the demo network): with a slow
    inhibitory rule (eta 5e-5) potentiation sets off a runaway, with the default rate (5e-3) inhibition keeps
    up and the point stays stable (simulated with capsweep on this machine, December 2026, 2 of 2 replicates
    each in configs/region-eta.toml). The former prescreen said "stable" for both."""
    verdicts = {}
    for eta in (5e-5, 5e-3):
        cfg = point_config(demo_network, TRIPLET_WITH_ISTDP,
                           **{"assemblies.count": 1, "plasticity.inhibitory.eta": eta})
        simulated = run_point(cfg, 11, wiring_seed=5)["outcome"]
        verdicts[eta] = (predict(cfg).outcome, simulated)
    assert verdicts[5e-5] == ("runaway", "runaway")
    assert verdicts[5e-3] == ("stable", "stable")


@pytest.mark.reference
def test_gamma_moment_match_of_the_trace() -> None:
    # [derived] the trace's mean r tau and variance r tau / 2 (Campbell's theorem) fix the gamma used above
    rate, tau = 40.0, 33.7e-3
    z = _trace_before_spikes(rate, tau, 50_000, 2)
    assert z.mean() == pytest.approx(rate * tau, rel=0.03)
    assert z.var() == pytest.approx(rate * tau / 2, rel=0.05)
    shape, scale = 2 * rate * tau, 0.5
    third = integrate.quad(lambda v: v**3 * stats.gamma.pdf(v, shape, scale=scale), 0, 60)[0]
    assert np.mean(z**3) == pytest.approx(third, rel=0.1)


@pytest.mark.xfail(strict=True, reason="schema 3.0 (5 December 2026) put the recall test's keys into every point id, "
                   "so every replicate now runs on a new seed; with these draws both replicates of (beta 1, 3 odours) "
                   "run away where the link says stable (and 1 of 2 at beta 3): the edge of region (a) is a chance "
                   "near these points, and the link awaits a refit on the new seeds")
def test_verdict_follows_beta_and_count_as_simulation_does() -> None:
    """Region (a), configs/region-beta.toml (full E->E rule, no inhibitory STDP, weak prewiring): at three odours
    a weak heterosynaptic term (beta 0.03) runs away and a strong one (beta 1) holds; at beta 1 one odour holds
    too. Both replicates of each grid point are simulated here and must agree with the prediction; the prescreen before
    the link said "stable" for all three."""
    points = expand(load_sweep(CONFIGS / "region-beta.toml"))
    want = {(0.03, 3): "runaway", (1.0, 3): "stable", (1.0, 1): "stable"}
    for (beta, count), outcome in want.items():
        replicates = [p for p in points if p.labels["beta"] == beta and p.labels["n_odours"] == count]
        assert predict(replicates[0].config).outcome == outcome, (beta, count)
        simulated = [run_point(p.config, p.seed, p.wiring_seed)["outcome"] for p in replicates]
        assert simulated == [outcome] * len(replicates), (beta, count, simulated)


def unhandled_choices(keys: tuple[Key, ...], handled: dict[str, dict[str, object]]) -> list[str]:
    """``key = value`` for every choice of a ``plasticity.*`` key among ``keys`` that ``handled`` has no handler for."""
    return [f"{key.path} = {choice!r}" for key in keys if key.path.startswith("plasticity.")
            for choice in key.choices if choice not in handled.get(key.path, {})]


def test_theory_handles_every_choice_of_every_plasticity_key(point_config) -> None:
    """Every value the registry offers for a plasticity key has a handler in the prescreen's rate dynamics, and the
    integration over a protocol runs with it; a choice added to the registry alone fails here (checked with one)."""
    assert any(key.path.startswith("plasticity.") and key.choices for key in KEYS)
    assert unhandled_choices(KEYS, dynamics.HANDLED_CHOICES) == []
    planted = replace(BY_PATH["plasticity.heterosynaptic.w_ref_mode"], choices=("fixed", "decaying"))
    assert unhandled_choices((planted,), dynamics.HANDLED_CHOICES) == ["plasticity.heterosynaptic.w_ref_mode = 'decaying'"]
    for path, handlers in dynamics.HANDLED_CHOICES.items():
        for choice in handlers:
            cfg = point_config(**{path: choice, "protocol.hold_s": 1.0,
                                  "plasticity.heterosynaptic.tau_consolidation_s": 1.0})
            run = dynamics.integrate(cfg)
            if path.endswith("w_ref_start"):  # the simulation's start: 0 (lower) or the initial weight [model.py]
                start = run.plastic[0]
                assert np.array_equal(start.within_ref, 0 * start.within if choice == "lower" else start.within)
                continue
            moved = not np.allclose(run.plastic[-1].within_ref, run.plastic[0].within_ref)
            assert moved == (choice != "fixed"), f"{path} = {choice!r}: the reference weights did not follow the mode"
