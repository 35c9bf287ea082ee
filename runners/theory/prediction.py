"""The prescreen's verdict for one point: outcome, recall during the final test and at the end weights.

The prescreen is a fitted surrogate built on mean-field quantities: theory supplies the quantities, and
the runaway verdict comes from a link fitted to simulations.

Two parts:

- The rate form of the plasticity rules is integrated over the point's own protocol
  (:func:`.dynamics.integrate`): the within-assembly, into/out-of-assembly, across-assembly and background
  E->E weights and the I->E weights onto members and non-members move at the mean-field rates, which are
  re-solved as the weights move, with each cue's (or imprint's) input while it is on. Its E rate trace is
  scored by the simulation's own rules (runaway onset by :func:`capsweep.runners.scoring.onset_in_schedule`,
  outcome by :func:`capsweep.runners.metrics.outcome`, recall by :func:`capsweep.runners.metrics.recall_score`
  and ``detection.recall_threshold``). A network silent in this run is predicted silent. A runaway of this
  run (the mean-field background igniting as the weights grow) is reported in ``reasons``, not used: on the
  region sweeps it called runaway where the simulations held (triplet STDP with inhibitory eta 5e-3).
- Otherwise the outcome is decided by the runaway chance of :mod:`.link`: theory quantities (pattern completion,
  the assembly's excitability after the rule has acted during activity, how fast the heterosynaptic and
  inhibitory terms act, the count and the hold) through a logistic function fitted once on a calibration
  design. "runaway" when the chance is :data:`.link.RUNAWAY_AT` or more.

So the verdict depends on the assembly count and size (group fractions), the rule's coefficients (beta, delta,
A, B, its time constants, eta, rho0), the clips (w_max of both rules against the initial weights), the
prewiring gain, and time (hold, cue and detection durations against the learning rates).

What the prediction ignores:

- spike correlations and synchrony: STDP is taken for independent Poisson trains, and the mean field finds no
  self-sustained assembly state where the simulated networks (60 cells per assembly, strong E-I loop) hold one
  in volleys; the link stands in for this, so it is only as good as its calibration design is close to the point
  (:mod:`.link` states the box);
- the spread of weights within a pathway (each pathway is one mean weight) and of in-degrees;
- cells of several assemblies (random overlap only changes the group fractions) and which cells a cue picks; the
  cue order is 0, 1, ... (the simulation draws it per seed);
- the transient of rates (they follow the weights instantly) and spike-frequency adaptation;
- an assembly still active after its cue: the integration lets it fall back to the rates before the cue, as the
  simulated networks mostly do within ~0.1 s (capsweep on this machine, December 2026: 10 ms population rate
  after a cue of one assembly of the demo network); whether it stays on is the link's chance.

Rates in Hz, weights in g_leak, times in s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ...flags import RUNAWAY, SILENT, STABLE
from .. import metrics, protocol
from .dynamics import Run, baseline_hz, final_cue_rates, integrate, onset_s, recall_at_end, recall_score
from .link import RUNAWAY_AT, outside_calibration, runaway_chance
from .meanfield import group_fractions


@dataclass(frozen=True)
class Prediction:
    """The prescreen's verdict for one point."""

    outcome: str  # one of capsweep.flags.OUTCOMES
    runaway_chance: float  # probability of a simulated runaway from the link (:mod:`.link`)
    outside_calibration: str  # where the point leaves the link's calibration box ('' inside; :mod:`.link`)
    recalled_count: int  # assemblies whose final-test cue reaches the recall criterion
    recall_state_exists: bool  # a cue at the end weights completes the assembly (members active, score reached)
    recall_state_stable: bool  # ... and that state returns after a nudge
    background_rate_hz: float  # predicted baseline E rate (settle phase)
    runaway_threshold_hz: float
    runaway_onset_s: float  # NaN if none
    peak_exc_hz: float  # highest predicted population E rate outside stimuli
    end_within_weight: float  # mean within-assembly weight at the end (g_leak)
    end_i_to_members: float  # mean I->E weight onto members at the end (g_leak)
    cued_rate_hz: float  # cued members during a cue at the end weights
    uncued_member_rate_hz: float  # uncued members then (pattern completion)
    count: int  # assemblies of the point
    steps: int  # rate solves in the integration
    reasons: str

    @property
    def stable(self) -> bool:
        """Predicted stable: the verdict the prescreen's stability bound counts (not success).

        The simulation's success (:mod:`capsweep.sweeps.success`) also asks that every assembly is recalled in
        the final test. The theory's recall does not enter: it underestimates how far a cue drags the uncued
        members along (on the 258 stable points of the calibration design it predicted full recall for 29 %,
        simulation found it for 77 %; capsweep, 4 December 2026), so a bound over stable counts is, as far as
        the stable verdicts are right, an upper bound of the capacity rather than a prediction of it.
        ``recalled_count`` and the recall-state fields are reported, not used.
        """
        return self.outcome == STABLE


def _peak(run: Run) -> float:
    """Highest population E rate (Hz) of a stimulus-free step after settle."""
    settle = run.schedule.seconds(run.schedule.settle_end)
    rates = [s.exc_hz for s in run.steps if s.segment.stimulus is None and s.t1 > settle]
    return max(rates) if rates else math.nan


def _recalled(cfg: dict, run: Run, baseline: float) -> int:
    """Final-test cues whose uncued members are active and whose recall score reaches the threshold."""
    det = cfg["detection"]
    active = metrics.active_threshold(det, baseline)
    fractions = group_fractions(cfg, cfg["protocol"]["cue_fraction"])
    return sum(1 for r in final_cue_rates(cfg, run)
               if r["U"] > active and recall_score(cfg, r, fractions) >= det["recall_threshold"])


def predict(cfg: dict) -> Prediction:
    """Predict a point's outcome (stable | runaway | silent), its recall and its end weights (see the module)."""
    det = cfg["detection"]
    run = integrate(cfg)
    sched = run.schedule
    baseline = baseline_hz(run)
    onset = onset_s(cfg, run)
    smooth = det["smoothing_s"]
    hold_end = sched.seconds(sched.hold_end)
    hold_rate = run.mean_exc(max(hold_end - smooth, 0.0), hold_end)
    tail_rate = run.mean_exc(sched.seconds(protocol.recall_end(sched)), sched.seconds(sched.end))
    rates_outcome = metrics.outcome(onset, hold_rate, tail_rate, det["silence_hz"])
    chance = runaway_chance(cfg)
    outcome = SILENT if rates_outcome == SILENT else RUNAWAY if chance >= RUNAWAY_AT else STABLE
    recalled = _recalled(cfg, run, baseline) if outcome != RUNAWAY else 0
    exists, stable, end_rates = recall_at_end(cfg, run)
    end, cued = run.plastic[-1], cfg["protocol"]["cue_fraction"]
    within, i_members = float(end.mean_within(cued).mean()), float(end.mean_i_members(cued).mean())
    count = cfg["assemblies"]["count"]
    threshold = metrics.runaway_threshold(det, baseline)
    peak = _peak(run)
    reasons = [f"baseline E {baseline:.2f} Hz, runaway threshold {threshold:.1f} Hz",
               f"runaway chance {chance:.0%}" + ("" if rates_outcome == outcome else f"; rate run {rates_outcome}"),
               f"end weights: within {within:.3f}, into/out/across/between "
               + "/".join(f"{w:.3f}" for w in end.paths)
               + f", I->members {i_members:.2f}, I->others {end.i_others:.2f}",
               f"peak E outside stimuli {peak:.1f} Hz"
               + (f", runaway at {onset:.2f} s" if math.isfinite(onset) else ""),
               f"recalled {recalled} of {count} in the final test",
               f"recall state at end weights: {'stable' if stable else 'exists, unstable' if exists else 'none'}"]
    return Prediction(
        outcome=outcome, runaway_chance=chance, outside_calibration=outside_calibration(cfg),
        recalled_count=recalled, recall_state_exists=exists,
        recall_state_stable=stable, background_rate_hz=baseline,
        runaway_threshold_hz=threshold, runaway_onset_s=onset, peak_exc_hz=peak,
        end_within_weight=within, end_i_to_members=i_members,
        cued_rate_hz=end_rates.get("C", math.nan), uncued_member_rate_hz=end_rates.get("U", math.nan),
        count=count, steps=len(run.steps), reasons="; ".join(reasons))
