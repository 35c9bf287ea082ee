"""The prescreen's verdict for one point: outcome, recall during the final test and at the end weights.

The verdict comes from integrating the rate form of the plasticity rules over the point's own protocol
(:func:`.dynamics.integrate`): the within-assembly, into/out-of-assembly, across-assembly and background
E->E weights and the I->E weights onto members and non-members move at the mean-field rates, which are
re-solved as the weights move, with each cue's (or imprint's) input while it is on. The predicted E rate
trace is then scored by the simulation's own rules: runaway onset by
:func:`capsweep.runners.scoring.onset_in_schedule`, outcome by :func:`capsweep.runners.metrics.outcome`,
recall by :func:`capsweep.runners.metrics.recall_score` and ``detection.recall_threshold``.

So the verdict depends on the assembly count (group fractions: more members, more excitatory feedback
and more cue periods; the across-assembly weights carry interference), size and overlap, the rule's
coefficients (beta, delta, A, B, its time constants, eta, rho0), the clips (w_max of both rules against
the initial weights), the prewiring gain, and time (settle, hold and cue durations against the learning
rates).

What the prediction ignores:

- spike correlations: STDP is taken for independent Poisson trains, so the extra potentiation of
  synapses inside a synchronously firing assembly, and synchrony itself, are missing;
- the spread of weights within a pathway (each pathway is one mean weight) and of in-degrees;
- cells of several assemblies (random overlap only changes the group fractions) and which cells a
  cue picks; the cue order is 0, 1, ... (the simulation draws it per seed);
- the stability of a state against oscillations and finite-size fluctuations: a state counts as
  stable when the rate iteration converges to it (static slope below 1), so a high asynchronous
  state of an assembly after its cue persists in the prediction, where the simulated network (60
  cells per assembly, strong E-I loop) falls out of it into short bursts within ~0.1 s. This is the
  main source of predicted runaways that simulation does not show (capsweep on this machine,
  December 2026: 10 ms population rate after a cue of one assembly of the demo network);
- the transient of rates (they follow the weights instantly) and spike-frequency adaptation;
- a previous assembly still active when the next one is cued is not followed (the new focal
  assembly starts from the other assemblies' rates).

Rates in Hz, weights in g_leak, times in s.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ...flags import OUTCOMES
from .. import metrics, protocol
from .dynamics import Run, baseline_hz, final_cue_rates, integrate, onset_s, recall_at_end, recall_score
from .meanfield import group_fractions

STABLE, RUNAWAY, SILENT = OUTCOMES[:3]
"""Outcome labels of :data:`capsweep.flags.OUTCOMES` (their positions are stored integers, so fixed)."""


@dataclass(frozen=True)
class Prediction:
    """Theory prescreen verdict for one point."""

    outcome: str  # one of capsweep.flags.OUTCOMES
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
    def success(self) -> bool:
        """Predicted success: stable, every assembly recalled in the final test, a stable recall state at the end.

        The simulation's success (:mod:`capsweep.sweeps.capacity`) is the first two; the third asks that the
        memories can still be recalled with the weights the protocol leaves.
        """
        return self.outcome == STABLE and self.recalled_count == self.count and self.recall_state_stable


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
    outcome = metrics.outcome(onset, hold_rate, tail_rate, det["silence_hz"])
    recalled = _recalled(cfg, run, baseline) if outcome != RUNAWAY else 0
    exists, stable, end_rates = recall_at_end(cfg, run)
    end, cued = run.plastic[-1], cfg["protocol"]["cue_fraction"]
    within, i_members = float(end.mean_within(cued).mean()), float(end.mean_i_members(cued).mean())
    count = cfg["assemblies"]["count"]
    threshold = metrics.runaway_threshold(det, baseline)
    peak = _peak(run)
    reasons = [f"baseline E {baseline:.2f} Hz, runaway threshold {threshold:.1f} Hz",
               f"end weights: within {within:.3f}, into/out/across/between "
               + "/".join(f"{w:.3f}" for w in end.paths)
               + f", I->members {i_members:.2f}, I->others {end.i_others:.2f}",
               f"peak E outside stimuli {peak:.1f} Hz"
               + (f", runaway at {onset:.2f} s" if math.isfinite(onset) else ""),
               f"recalled {recalled} of {count} in the final test",
               f"recall state at end weights: {'stable' if stable else 'exists, unstable' if exists else 'none'}"]
    return Prediction(
        outcome=outcome, recalled_count=recalled, recall_state_exists=exists,
        recall_state_stable=stable, background_rate_hz=baseline,
        runaway_threshold_hz=threshold, runaway_onset_s=onset, peak_exc_hz=peak,
        end_within_weight=within, end_i_to_members=i_members,
        cued_rate_hz=end_rates.get("C", math.nan), uncued_member_rate_hz=end_rates.get("U", math.nan),
        count=count, steps=len(run.steps), reasons="; ".join(reasons))
