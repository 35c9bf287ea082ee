"""Rate-form weight dynamics over a point's protocol, with mean-field rates re-solved as the weights move.

The protocol of :mod:`capsweep.runners.protocol` (settle, imprint, hold with recall tests, final
recall, tail) is cut into segments with a constant stimulus. Within a segment the weights move by
the rate form of the rules (E->E: :func:`.drift.rule_drift`; I->E: :func:`.drift.inhibitory_drift`)
at the current mean-field rates, integrated exactly over steps short enough that no weight moves by
more than :data:`STEP_FRACTION` of itself (at most :data:`MAX_STEP_S`, at least :data:`MIN_STEP_S`);
after each step the rates are re-solved from the previous ones (:func:`.meanfield.solve_rates`,
which follows the state the network is in: a background state that disappears ignites). After a
stimulus the stimulated assembly starts again from the rates before it: the simulated networks fall out
of a high state within ~0.1 s in most runs, and whether they stay there is a matter of chance that the
prescreen's link (:mod:`.link`) weighs, not this integration.

The rules' traces see rates low-passed with their own time constants (:class:`Lag`), so a cue of a
few hundred ms potentiates less than the stationary rate form says.

Weights tracked (g_leak): per assembly, its within weights split by its cued (C) and uncued (U) cells
(C->C, C->U, U->C, U->U: the cue reaches the same cells in every test, so a cue potentiates C->C
before C->U, the pathway that completes the pattern) and the I->E weights onto its C and U cells; the
non-member -> member (``into``), member -> non-member (``out``), member -> member of
another assembly (``across``) and non-member -> non-member (``between``) E->E weights; the I->E weight
onto non-members. Each weight stands for the mean of its pathway, drifting with the mean of the
drifts over the groups it connects (group fractions as weights; the drift is linear in w, so the
mean obeys the same linear equation). Reference weights follow ``w_ref_mode`` (:data:`REFERENCE_STEPS`):
fixed, consolidating (``tau_cons dw_ref/dt = w - w_ref``) or bistable (Zenke, Agnes & Gerstner 2015, Nat
Commun 6:6922, Methods: ``tau_cons dw_ref/dt = w - w_ref - P w_ref (w_P/2 - w_ref)(w_P - w_ref)``), each
with the weight held at its value after the step, as the simulation holds it between consolidation updates.

Rates in Hz, times in s, weights in g_leak.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from .. import metrics, protocol
from ..scoring import onset_in_schedule
from .drift import Lagged, inhibitory_drift, linear_drift, relax
from .meanfield import E_GROUPS, MEMBERS, Scenario, Weights, cue_stimulus, group_fractions, initial_weights, solve_rates

PATHS = ("into", "out", "across", "between")
"""Shared E->E pathways, in the order of :attr:`Plastic.paths`."""
SUBPATHS = (("C", "C"), ("C", "U"), ("U", "C"), ("U", "U"))
"""(pre, post) parts of an assembly's within weights: its cued (C) and uncued (U) cells, fixed per point."""
STEP_FRACTION = 0.1
"""Largest relative change of any weight per step: rates are held fixed over a step (numerical choice)."""
MAX_STEP_S = 0.25
"""Longest step (s) between rate solves."""
MIN_STEP_S = 0.002
"""Shortest step (s): rates follow inputs within the synaptic and effective membrane time constants (~ms)."""
LAG_STEP = 0.5
"""Longest step as a fraction of the slowest trace time constant still catching up with its rate."""
SOLVE_ITERATIONS = 150
"""Iterations of the warm-started rate solve per step."""
BISTABLE_H = 0.01
"""Longest substep of the bistable reference weight, as a fraction of tau_consolidation (numerical choice: the
scheme's error is first order in it)."""


def _sub_fractions(cued: float) -> np.ndarray:
    """Share of an assembly's within synapses in each of SUBPATHS (random wiring: product of the group shares)."""
    share = {"C": cued, "U": 1.0 - cued}
    return np.array([share[a] * share[b] for a, b in SUBPATHS])


@dataclass
class Plastic:
    """Weights plasticity moves (g_leak) and their reference weights."""

    within: np.ndarray  # (count, 4) within-assembly weights of each assembly, per SUBPATHS
    within_ref: np.ndarray
    paths: np.ndarray  # (4,) mean weight of each pathway in PATHS
    paths_ref: np.ndarray
    i_members: np.ndarray  # (count, 2) I->E onto each assembly's cued and uncued cells
    i_others: float  # I->E onto non-members

    def mean_within(self, cued: float) -> np.ndarray:
        """Mean within weight of each assembly (g_leak)."""
        return self.within @ _sub_fractions(cued)

    def mean_i_members(self, cued: float) -> np.ndarray:
        """Mean I->E weight onto each assembly's members (g_leak)."""
        return self.i_members @ np.array([cued, 1.0 - cued])

    def weights(self, cfg: dict, focal: int) -> Weights:
        """The mean field's weights with assembly ``focal`` in groups C and U, the rest in B."""
        net, cued = cfg["network"], cfg["protocol"]["cue_fraction"]
        others = np.delete(np.arange(len(self.within)), focal)
        pick = others if len(others) else np.array([focal])
        into, out, across, between = (float(x) for x in self.paths)
        i_focal = self.i_members[focal]
        return Weights(within=float(self.mean_within(cued)[focal]), between=between, e_to_i=net["w_e_to_i"],
                       i_to_i=net["w_i_to_i"],
                       i_to_e={"C": float(i_focal[0]), "U": float(i_focal[1]),
                               "B": float(self.mean_i_members(cued)[pick].mean()), "O": self.i_others},
                       within_other=float(self.mean_within(cued)[pick].mean()), into=into, out=out, across=across,
                       focal={sub: float(w) for sub, w in zip(SUBPATHS, self.within[focal])})


def initial_plastic(cfg: dict) -> Plastic:
    """Weights at the start of a run (:func:`.meanfield.initial_weights`), I->E clipped to the rule's cap."""
    w0, count = initial_weights(cfg), max(cfg["assemblies"]["count"], 1)
    i0 = w0.i_to_e["O"]
    inh = cfg["plasticity"]["inhibitory"]
    if inh["enabled"]:
        i0 = min(i0, inh["w_max"])
    paths = np.array([w0.into, w0.out, w0.across, w0.between])
    within = np.full((count, len(SUBPATHS)), w0.within)
    start = REFERENCE_STARTS[cfg["plasticity"]["heterosynaptic"]["w_ref_start"]]
    return Plastic(within, start(within), paths, start(paths), np.full((count, 2), i0), i0)


@dataclass(frozen=True)
class Segment:
    """A stretch of protocol time (s) with one stimulus: none, a cue or an imprint input onto ``focal``."""

    t0: float
    t1: float
    focal: int  # assembly in groups C/U (the one stimulated, or the last one stimulated)
    stimulus: tuple[float, float] | None  # (weight g_leak, rate Hz) onto each target cell
    targets: tuple[str, ...] = ("C",)  # groups the stimulus reaches: the cued cells, or every member (imprint)


def segments(cfg: dict, sched: protocol.Schedule) -> list[Segment]:
    """The point's protocol as segments, in time order; plasticity freezing (if set) starts a new segment."""
    pr = cfg["protocol"]
    imprint = (pr["imprint_weight"], pr["imprint_rate_hz"])
    events = sorted([(a, b, k, imprint, ("C", "U")) for k, a, b in sched.imprint_windows]
                    + [(a, b, k, cue_stimulus(cfg), ("C",)) for k, a, b in sched.all_cues])
    out, t, focal = [], 0, 0
    for a, b, k, stim, targets in events:
        if a > t:
            out.append(Segment(sched.seconds(t), sched.seconds(a), focal, None))
        out.append(Segment(sched.seconds(a), sched.seconds(b), k, stim, targets))
        t, focal = b, k
    if sched.end > t:
        out.append(Segment(sched.seconds(t), sched.seconds(sched.end), focal, None))
    freeze = protocol.freeze_time_s(cfg, sched)
    split = []
    for s in out:
        if s.t0 < freeze < s.t1:
            split += [replace(s, t1=freeze), replace(s, t0=freeze)]
        else:
            split.append(s)
    return split



@dataclass(frozen=True)
class Step:
    """One step of the integration: protocol time (s), the stimulus and the group rates (Hz) held over it."""

    t0: float
    t1: float
    segment: Segment
    rates: dict[str, float]
    fractions: dict[str, float]

    @property
    def exc_hz(self) -> float:
        """Population mean E rate (Hz)."""
        return sum(self.fractions[g] * self.rates[g] for g in E_GROUPS)


class Lag:
    """Group rates (Hz) low-passed with each trace time constant of the rules: what the traces see.

    ``tau dr_f/dt = r - r_f`` per group (rates constant over a step, integrated exactly); at rest r_f = r.
    """

    def __init__(self, cfg: dict, rates: dict[str, float]) -> None:
        tri = cfg["plasticity"]["triplet"]
        ms = {"plus": tri["tau_plus_ms"], "minus": tri["tau_minus_ms"], "slow": tri["tau_slow_ms"],
              "inh": cfg["plasticity"]["inhibitory"]["tau_ms"]}
        self.taus = {name: value * 1e-3 for name, value in ms.items()}
        self.hz = {name: dict(rates) for name in self.taus}

    def advance(self, rates: dict[str, float], dt: float) -> None:
        """Low-passed rates after ``dt`` seconds at ``rates``."""
        for name, tau in self.taus.items():
            decay = math.exp(-dt / tau)
            self.hz[name] = {g: rates[g] + (self.hz[name][g] - rates[g]) * decay for g in rates}

    def enter(self, groups: tuple[str, ...], like: str) -> None:
        """Groups that now stand for other cells take the low-passed rates of group ``like``."""
        for hz in self.hz.values():
            hz.update({g: hz[like] for g in groups})

    def ee(self, pre: str, post: str) -> Lagged:
        """What the E->E traces see on a synapse from group ``pre`` to group ``post``."""
        return Lagged(self.hz["plus"][pre], self.hz["minus"][post], self.hz["slow"][post])

    def ie(self, post: str) -> tuple[float, float]:
        """What the I->E traces see onto group ``post``: (I rate, post rate), low-passed."""
        return self.hz["inh"]["I"], self.hz["inh"][post]

    def lagging(self, rates: dict[str, float], rel: float = 0.25) -> float:
        """Longest time constant (s) of a low-passed rate more than ``rel`` away from its rate; 0 if none."""
        return max((tau for name, tau in self.taus.items()
                    if any(abs(self.hz[name][g] - r) > rel * max(abs(r), 1.0) for g, r in rates.items())), default=0.0)


def _pair_mean(cfg: dict, pairs: list[tuple[float, str, str]], w_ref: float, r: dict[str, float],
               lag: Lag) -> tuple[float, float]:
    """Mean (c, k) of the linear E->E drift over (weight, pre group, post group) pairs; (0, 0) without pairs."""
    total = sum(p for p, _, _ in pairs)
    if total <= 0:
        return 0.0, 0.0
    ck = np.array([linear_drift(cfg, r[a], r[b], w_ref, lag.ee(a, b)) for _, a, b in pairs])
    weights = np.array([p for p, _, _ in pairs]) / total
    return float(weights @ ck[:, 0]), float(weights @ ck[:, 1])


def _path_pairs(fr: dict[str, float], size: float) -> dict[str, list[tuple[float, str, str]]]:
    """(fraction product, pre group, post group) of the groups each shared pathway connects."""
    focal = ("C", "U")
    members = [g for g in MEMBERS if fr[g] > 0]
    across = [(fr[a] * fr["B"], a, "B") for a in focal] + [(fr["B"] * fr[b], "B", b) for b in focal]
    across.append((fr["B"] * max(fr["B"] - size, 0.0), "B", "B"))
    return {
        "into": [(fr["O"] * fr[g], "O", g) for g in members],
        "out": [(fr[g] * fr["O"], g, "O") for g in members],
        "across": across,
        "between": [(fr["O"] ** 2, "O", "O")],
    }


@dataclass
class _Drift:
    """Linear E->E drift coefficients and constant I->E drifts at fixed rates."""

    within_c: np.ndarray  # (count, 4)
    within_k: np.ndarray
    paths_c: np.ndarray
    paths_k: np.ndarray
    i_members: np.ndarray  # (count, 2), g_leak/s
    i_others: float


def _drift(cfg: dict, p: Plastic, focal: int, fr: dict[str, float], r: dict[str, float], lag: Lag) -> _Drift:
    """Drift of every tracked weight at the group rates ``r`` (traces lagging as ``lag``), ``focal`` in C/U."""
    wc, wk, im = np.zeros(p.within.shape), np.zeros(p.within.shape), np.zeros(p.i_members.shape)
    for j in range(len(p.within)):
        pre_post = SUBPATHS if j == focal else [("B", "B")] * len(SUBPATHS)
        for i, (a, b) in enumerate(pre_post):
            wc[j, i], wk[j, i] = linear_drift(cfg, r[a], r[b], float(p.within_ref[j, i]), lag.ee(a, b))
        posts = ("C", "U") if j == focal else ("B", "B")
        im[j] = [inhibitory_drift(cfg, r["I"], r[g], lag.ie(g)) for g in posts]
    pairs_of = _path_pairs(fr, fr["C"] + fr["U"])
    ck = np.array([_pair_mean(cfg, pairs_of[name], float(ref), r, lag) for name, ref in zip(PATHS, p.paths_ref)])
    return _Drift(wc, wk, ck[:, 0], ck[:, 1], im, inhibitory_drift(cfg, r["I"], r["O"], lag.ie("O")))


def _step_length(cfg: dict, p: Plastic, d: _Drift, longest: float) -> float:
    """Step (s): no weight that is free to move changes by more than STEP_FRACTION of itself (or of its reference)."""
    w_max, i_max = cfg["plasticity"]["triplet"]["w_max"], cfg["plasticity"]["inhibitory"]["w_max"]
    n_ee, n_ie = p.within.size + p.paths.size, p.i_members.size + 1
    values = np.concatenate([p.within.ravel(), p.paths, p.i_members.ravel(), [p.i_others]])
    refs = np.concatenate([p.within_ref.ravel(), p.paths_ref, np.full(n_ie, cfg["network"]["w_i_to_e"])])
    rates = np.concatenate([(d.within_c - d.within_k * (p.within - p.within_ref)).ravel(),
                            d.paths_c - d.paths_k * (p.paths - p.paths_ref), d.i_members.ravel(), [d.i_others]])
    caps = np.concatenate([np.full(n_ee, w_max), np.full(n_ie, i_max)])
    free = ~(((values >= caps) & (rates > 0)) | ((values <= 0) & (rates < 0))) & (rates != 0)
    if not free.any():
        return longest
    scale = STEP_FRACTION * np.maximum(np.maximum(values, refs), 1e-6)
    return float(np.clip(np.min(scale[free] / np.abs(rates[free])), MIN_STEP_S, longest))


def _advance(cfg: dict, p: Plastic, d: _Drift, dt: float) -> Plastic:
    """Weights after ``dt`` seconds at fixed rates (exact for each weight; references consolidate if set)."""
    pl = cfg["plasticity"]
    w_max, i_max = pl["triplet"]["w_max"], pl["inhibitory"]["w_max"]
    within = relax(p.within, d.within_c, d.within_k, p.within_ref, dt, w_max)
    paths = relax(p.paths, d.paths_c, d.paths_k, p.paths_ref, dt, w_max)
    het = pl["heterosynaptic"]
    step = REFERENCE_STEPS[het["w_ref_mode"]]
    within_ref, paths_ref = step(het, within, p.within_ref, dt), step(het, paths, p.paths_ref, dt)
    return Plastic(within, within_ref, paths, paths_ref, np.clip(p.i_members + d.i_members * dt, 0.0, i_max),
                   float(np.clip(p.i_others + d.i_others * dt, 0.0, i_max)))


def fixed_reference(het: dict, w: np.ndarray, w_ref: np.ndarray, dt: float) -> np.ndarray:
    """``w_ref_mode = "fixed"``: the reference weight stays where it is."""
    return w_ref


def consolidating_reference(het: dict, w: np.ndarray, w_ref: np.ndarray, dt: float) -> np.ndarray:
    """``w_ref_mode = "consolidating"``: ``tau_cons dw_ref/dt = w - w_ref`` over ``dt`` s with ``w`` held (exact)."""
    return w_ref + (1.0 - math.exp(-dt / het["tau_consolidation_s"])) * (w - w_ref)


def bistable_reference(het: dict, w: np.ndarray, w_ref: np.ndarray, dt: float) -> np.ndarray:
    """``w_ref_mode = "bistable"``: ``tau_cons dw_ref/dt = f = w - w_ref - P w_ref (w_P/2 - w_ref)(w_P - w_ref)``
    (Zenke, Agnes & Gerstner 2015, Nat Commun 6:6922, Methods) over ``dt`` s with ``w`` held, g_leak.

    Substeps of at most :data:`BISTABLE_H` tau_cons, each ``w_ref += h f / (1 + h |f'|)``: the step of the
    simulation (:func:`capsweep.runners.rules.consolidation_step` gives its derivation), whose fixed points are
    exactly the roots of f and which never crosses the unstable one.
    """
    p, w_p = het["bistable_strength"], het["bistable_upper_weight"]
    h_total = dt / het["tau_consolidation_s"]
    n = max(1, math.ceil(h_total / BISTABLE_H))
    h = h_total / n
    ref = np.array(w_ref, dtype=float)
    for _ in range(n):
        f = w - ref - p * ref * (w_p / 2 - ref) * (w_p - ref)
        slope = -1.0 - p * (3 * ref**2 - 3 * w_p * ref + w_p**2 / 2)
        ref = ref + h * f / (1.0 + h * np.abs(slope))
    return ref


REFERENCE_STEPS = {"fixed": fixed_reference, "consolidating": consolidating_reference, "bistable": bistable_reference}
"""How the reference weights move over a step, per ``plasticity.heterosynaptic.w_ref_mode``."""
REFERENCE_STARTS: dict[str, Callable[[np.ndarray], np.ndarray]] = {"initial": np.copy, "lower": np.zeros_like}
"""Reference weights at the start of a run from the initial weights, per ``plasticity.heterosynaptic.w_ref_start``
(as :func:`capsweep.runners.model.reference_start` sets them in the simulation)."""
HANDLED_CHOICES = {"plasticity.heterosynaptic.w_ref_mode": REFERENCE_STEPS,
                   "plasticity.heterosynaptic.w_ref_start": REFERENCE_STARTS}
"""Every plasticity key with a choice of values, and the theory's handler of each value (a test holds this
against the registry: a choice the simulation offers and the theory ignores fails it)."""


def _scenario(cfg: dict, p: Plastic, seg: Segment) -> Scenario:
    return Scenario(p.weights(cfg, seg.focal), group_fractions(cfg, cfg["protocol"]["cue_fraction"]), seg.stimulus,
                    seg.targets)


def solve(cfg: dict, sc: Scenario, start: dict[str, float]) -> dict[str, float]:
    """Group rates (Hz) of the state the network reaches from ``start`` under scenario ``sc``."""
    return solve_rates(cfg, sc, {}, start, iterations=SOLVE_ITERATIONS)


@dataclass
class Run:
    """The integrated protocol of one point."""

    schedule: protocol.Schedule
    steps: list[Step] = field(default_factory=list)
    plastic: list[Plastic] = field(default_factory=list)  # weights at the start of each step, and at the end
    stopped_s: float = math.nan  # time the run stopped at a runaway onset (NaN: ran to the end)

    def trace(self, bin_s: float) -> np.ndarray:
        """Population E rate (Hz) in bins of ``bin_s`` from 0 to the last step's end."""
        end = self.steps[-1].t1 if self.steps else 0.0
        n = int(math.ceil(end / bin_s - 1e-9))
        out = np.zeros(n)
        for s in self.steps:
            first, last = int(s.t0 / bin_s + 1e-9), min(int(math.ceil(s.t1 / bin_s - 1e-9)), n)
            for b in range(first, last):
                overlap = min(s.t1, (b + 1) * bin_s) - max(s.t0, b * bin_s)
                out[b] += s.exc_hz * max(overlap, 0.0) / bin_s
        return out

    def mean_rates(self, t0: float, t1: float) -> dict[str, float]:
        """Time-averaged group rates (Hz) over [t0, t1)."""
        total, acc = 0.0, dict.fromkeys((*E_GROUPS, "I"), 0.0)
        for s in self.steps:
            overlap = min(s.t1, t1) - max(s.t0, t0)
            if overlap > 0:
                total += overlap
                for g in acc:
                    acc[g] += overlap * s.rates[g]
        return {g: v / total for g, v in acc.items()} if total > 0 else dict.fromkeys(acc, math.nan)

    def mean_exc(self, t0: float, t1: float) -> float:
        """Time-averaged population E rate (Hz) over [t0, t1); NaN if the run did not reach t1."""
        if not self.steps or self.steps[-1].t1 < t1 - 1e-9:
            return math.nan
        total = sum(max(min(s.t1, t1) - max(s.t0, t0), 0.0) * s.exc_hz for s in self.steps)
        return total / (t1 - t0) if t1 > t0 else math.nan


def baseline_hz(run: Run) -> float:
    """Predicted baseline E rate (Hz) over the window the simulation's baseline uses."""
    sched = run.schedule
    return run.mean_exc(sched.seconds(sched.baseline_start), sched.seconds(sched.settle_end))


def onset_s(cfg: dict, run: Run) -> float:
    """Runaway onset (s) of the predicted E rate trace, by the simulation's own detector."""
    det = cfg["detection"]
    bin_s = det["trace_bin_ms"] * 1e-3
    return onset_in_schedule(run.trace(bin_s), baseline_hz(run), det, run.schedule, bin_s)


def integrate(cfg: dict) -> Run:
    """Integrate rates and weights over the point's protocol (cues in assembly order 0, 1, ...).

    Stops at the end of the first segment after which the simulation's runaway detector fires on
    the predicted trace (the simulation aborts there too).
    """
    sched = protocol.schedule(cfg)
    run = Run(sched)
    p = initial_plastic(cfg)
    freeze = protocol.freeze_time_s(cfg, sched)
    first = segments(cfg, sched)[0]
    rates = solve(cfg, _scenario(cfg, p, first), {g: 1.0 for g in (*E_GROUPS, "I")})
    lag = Lag(cfg, rates)
    previous, rest = first, rates
    for seg in segments(cfg, sched):
        if seg.focal != previous.focal:  # a fresh assembly enters C/U: it starts where the other ones are
            rates = {**rates, "C": rates["B"], "U": rates["B"]}
            lag.enter(("C", "U"), "B")
        if seg.stimulus is None and previous.stimulus is not None:
            rates = dict(rest)  # the stimulated assembly falls back (see the module)
        elif seg.stimulus is not None and previous.stimulus is None:
            rest = rates
        previous = seg
        t = seg.t0
        while t < seg.t1 - 1e-9:
            sc = _scenario(cfg, p, seg)
            rates = solve(cfg, sc, rates)
            d = _drift(cfg, p, seg.focal, sc.fractions, rates, lag)
            longest = MAX_STEP_S if not lag.lagging(rates) else max(LAG_STEP * lag.lagging(rates), MIN_STEP_S)
            dt = seg.t1 - t if t >= freeze else min(_step_length(cfg, p, d, longest), seg.t1 - t)
            run.steps.append(Step(t, t + dt, seg, rates, sc.fractions))
            run.plastic.append(p)
            if t < freeze:
                p = _advance(cfg, p, d, dt)
            lag.advance(rates, dt)
            t += dt
        if seg.t1 > sched.seconds(sched.settle_end) and math.isfinite(onset_s(cfg, run)):
            run.stopped_s = seg.t1
            break
    run.plastic.append(p)
    return run


def final_cue_rates(cfg: dict, run: Run) -> list[dict[str, float]]:
    """Per cue of the final recall test reached: group rates (Hz) over the window the recall mode scores."""
    pr, sched = cfg["protocol"], run.schedule
    persistent = cfg["detection"]["recall_mode"] == "persistent"
    out = []
    for _, a, b in sched.cue_windows:
        t0, t1 = sched.seconds(a) + pr["cue_skip_s"], sched.seconds(b)
        if persistent:
            t0, t1 = t1, t1 + pr["persistence_window_s"]
        if run.steps and run.steps[-1].t1 >= t1 - 1e-9:
            out.append(run.mean_rates(t0, t1))
    return out


def recall_score(cfg: dict, rates: dict[str, float], fractions: dict[str, float]) -> float:
    """The simulation's recall score (:func:`capsweep.runners.metrics.recall_score`) of cells firing at group rates.

    Cells are laid out in proportion to the group fractions of ``n_exc``; C cells are the cued ones.
    """
    n = cfg["network"]["n_exc"]
    sizes = {g: int(round(fractions[g] * n)) for g in E_GROUPS}
    counts = np.concatenate([np.full(sizes[g], rates[g]) for g in E_GROUPS])
    groups = np.concatenate([np.full(sizes[g], g) for g in E_GROUPS])
    return metrics.recall_score(counts, np.isin(groups, ("C", "U")), groups == "C")


def state_is_stable(cfg: dict, sc: Scenario, rates: dict[str, float], nudge: float = 0.1, tol_hz: float = 0.5) -> bool:
    """True if the rates return to ``rates`` (within ``tol_hz``) after every member group is nudged by +-``nudge``."""
    for sign in (-1.0, 1.0):
        start = {**rates, **{g: rates[g] * (1.0 + sign * nudge) for g in ("C", "U")}}
        back = solve(cfg, sc, start)
        if any(abs(back[g] - rates[g]) > tol_hz for g in E_GROUPS if sc.fractions[g] > 0):
            return False
    return True


def recall_at_end(cfg: dict, run: Run) -> tuple[bool, bool, dict[str, float]]:
    """Cue assembly 0 at the end weights: (recall state exists, it is stable, its group rates in Hz).

    The recall state exists when the cued assembly's uncued members are active
    (:func:`capsweep.runners.metrics.active_threshold`) and the recall score reaches
    ``detection.recall_threshold``; it is stable when a nudge of the members' rates returns to it.
    """
    det, p = cfg["detection"], run.plastic[-1]
    if cfg["assemblies"]["count"] == 0:
        return False, False, {}
    seg = Segment(0.0, 1.0, 0, cue_stimulus(cfg))
    sc = _scenario(cfg, p, seg)
    start = run.steps[-1].rates if run.steps else {g: 1.0 for g in (*E_GROUPS, "I")}
    rates = solve(cfg, sc, {**start, "C": start["B"], "U": start["B"]})
    active = metrics.active_threshold(det, baseline_hz(run))
    exists = rates["U"] > active and recall_score(cfg, rates, sc.fractions) >= det["recall_threshold"]
    return bool(exists), exists and state_is_stable(cfg, sc, rates), rates

