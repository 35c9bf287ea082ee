"""Score a finished simulation: what it recorded -> one value per store variable.

Both engines (:mod:`capsweep.runners.runtime`, :mod:`capsweep.runners.standalone`) hand back a
:class:`Recording`; :func:`score` turns it into the metrics of
``capsweep.results_schema.layout.VARIABLES`` (except ``predicted_outcome``). No Brian2 here.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from ..engines import threads_of
from ..flags import ALREADY_ACTIVE, RECALLED
from . import metrics, protocol

if TYPE_CHECKING:
    from .model import Handles


@dataclass
class Recording:
    """What a simulation leaves for scoring: spikes before ``sim_time_s`` and E->E weights."""

    t_exc: np.ndarray  # s
    i_exc: np.ndarray
    t_inh: np.ndarray  # s
    sim_time_s: float
    weights: dict[str, np.ndarray]  # "imprint" and "snap{i}" when reached
    snaps: list[np.ndarray]  # hold snapshots reached, in order
    setup_s: float = 0.0  # wall s before the first simulated step (building, compiling); see layout's setup_time_s
    ref_snaps: list[np.ndarray] = field(default_factory=list)  # E->E w_ref at the same snapshots (w_ref_mode not fixed)


def onset_in_schedule(rate: np.ndarray, baseline: float, det: dict, sched: protocol.Schedule, bin_s: float,
                      start_s: float | None = None) -> float:
    """Runaway onset (s) of a rate trace (Hz, bins of ``bin_s`` s) under the point's detection settings, from
    ``start_s`` (default: the end of settle). The one definition for the E population and each assembly's members."""
    threshold = metrics.runaway_threshold(det, baseline)
    start = sched.seconds(sched.settle_end) if start_s is None else start_s
    return metrics.runaway_onset(rate, bin_s, det["smoothing_s"], threshold, det["runaway_hold_s"],
                                 protocol.cue_bins(sched, bin_s, len(rate)), start)


def stuck_onsets(det: dict, h: Handles, times: np.ndarray, cells: np.ndarray, baseline: float,
                 sim_time_s: float) -> np.ndarray:
    """Per assembly: runaway onset (s) of its members' rate from hold start (imprint inputs left out), NaN if never."""
    bin_s, sched = det["trace_bin_ms"] * 1e-3, h.schedule
    onsets = np.full(len(h.memberships), np.nan)
    for k, members in enumerate(h.memberships):
        rate = metrics.binned_rate(times[members[cells]], int(members.sum()), bin_s, sim_time_s)
        onsets[k] = onset_in_schedule(rate, baseline, det, sched, bin_s, sched.seconds(sched.imprint_end))
    return onsets


def baseline_rate(times: np.ndarray, n_exc: int, sched: protocol.Schedule) -> float:
    """Baseline E rate (Hz): mean over the window from ``detection.baseline_start_s`` to the end of settle."""
    return metrics.mean_rate(times, n_exc, sched.seconds(sched.baseline_start), sched.seconds(sched.settle_end))


PER_ASSEMBLY = ("recall_quality", "persistence", "recall_score", "persistence_score", "recall_contrast",
                "completion", "spurious", "cross_talk", "cue_time_s", "evoked_completion_hz", "recall_p_value",
                "recall_p_cells", "recall_p_times", "recall_z", "precue_rate_hz")
"""Float result variables with one entry per assembly (NaN where the run ended before that assembly's cue)."""


def _cue_scores(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, cue: tuple[int, int, int],
                active_hz: float) -> dict[str, float]:
    """The overlap-based scores of one cue ``(assembly, start step, stop step)``."""
    pr, sched = cfg["protocol"], h.schedule
    k, a, b = cue
    t0, t1 = sched.seconds(a) + pr["cue_skip_s"], sched.seconds(b)
    n_exc = len(h.exc)
    during = metrics.window_counts(times, cells, n_exc, t0, t1)
    after = metrics.window_counts(times, cells, n_exc, t1, t1 + pr["persistence_window_s"])
    mem, cued = h.memberships[k], h.cued[k]
    return {
        "recall_quality": metrics.recall_quality(during, mem, cued),
        "persistence": metrics.recall_quality(after, mem, cued),
        "recall_score": metrics.recall_score(during, mem, cued),
        "persistence_score": metrics.recall_score(after, mem, cued),
        "recall_contrast": metrics.rate_contrast(during, mem, cued),
        "completion": metrics.completion(during, t1 - t0, mem, cued, active_hz),
        "spurious": metrics.spurious(during, t1 - t0, mem, active_hz),
        "cross_talk": metrics.cross_talk(during, h.memberships, k),
        "cue_time_s": sched.seconds(a),
    }


def _cue_test(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, cue: tuple[int, int, int],
              active_hz: float, seed: int, end_s: float) -> metrics.RecallTest:
    """The recall test of one cue in the windows of ``detection.recall_mode``; its background times are those up
    to ``end_s`` (s). Its nulls are drawn from a generator seeded by the point's seed and the cue's start step,
    so every test is reproducible on its own."""
    det, sched = cfg["detection"], h.schedule
    k, a, b = cue
    recall, pre = protocol.test_windows(0.0, sched.seconds(b - a), cfg["protocol"], det["recall_mode"])
    start = sched.seconds(a)
    n_exc = len(h.exc)
    during = metrics.window_counts(times, cells, n_exc, start + recall[0], start + recall[1])
    before = metrics.window_counts(times, cells, n_exc, start + pre[0], start + pre[1])
    rng = np.random.default_rng([seed, 3, a])
    starts = metrics.uniform_in_spans(protocol.background_starts(sched, end_s, recall, pre),
                                      det["recall_null_draws"], rng)
    uncued = h.memberships[k] & ~h.cued[k]
    shifted = metrics.shifted_differences(np.sort(times[uncued[cells]]), starts, recall, pre)
    return metrics.recall_test(during, before, recall[1] - recall[0], h.memberships[k], h.cued[k], shifted, rng,
                               active_hz, det["recall_alpha"])


def recall_metrics(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, baseline: float,
                   reached: bool, seed: int, end_s: float) -> dict[str, object]:
    """Per-assembly scores and recall test of the final recall test (see the metric definitions); ``end_s``: the
    end of the simulated run (s). NaN (states None, positions -1) unless ``reached``.
    """
    count = len(h.memberships)
    out: dict[str, object] = {n: np.full(count, np.nan) for n in PER_ASSEMBLY}
    states: list[str | None] = [None] * count
    position = np.full(count, -1)
    if reached:
        active = metrics.active_threshold(cfg["detection"], baseline)
        for slot, cue in enumerate(h.schedule.cue_windows):
            k = cue[0]
            test = _cue_test(cfg, h, times, cells, cue, active, seed, end_s)
            values = {**_cue_scores(cfg, h, times, cells, cue, active), "evoked_completion_hz": test.evoked_hz,
                      "recall_p_value": test.p_value, "recall_p_cells": test.p_cells, "recall_p_times": test.p_times,
                      "recall_z": test.z, "precue_rate_hz": test.precue_rate_hz}
            for name, value in values.items():
                out[name][k] = value  # type: ignore[index]
            states[k], position[k] = test.state, slot
    return {**out, "recall_state": states, "test_position": position}


def success_score(det: dict) -> str:
    """Name of the overlap score of ``detection.recall_mode`` (cued: recall_score; persistent: persistence_score)."""
    return "recall_score" if det["recall_mode"] == "cued" else "persistence_score"


def recall_counts(recall: dict[str, object], det: dict) -> dict[str, int]:
    """Final-test counts: recalled and already active (recall test), and recalled by the overlap score's threshold."""
    states = list(recall["recall_state"])  # type: ignore[call-overload]
    score = np.asarray(recall[success_score(det)])
    return {"recalled_count": states.count(RECALLED), "already_active_count": states.count(ALREADY_ACTIVE),
            "overlap_recalled_count": int(np.sum(score >= det["recall_threshold"]))}


def _verdicts(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, cues: Sequence[tuple[int, int, int]],
              baseline: float, seed: int, sim_time_s: float) -> tuple[list[bool], list[float]]:
    """Per cue of one recall test: recalled by the recall test, and the overlap score of ``detection.recall_mode``."""
    active, score = metrics.active_threshold(cfg["detection"], baseline), success_score(cfg["detection"])
    recalled = [_cue_test(cfg, h, times, cells, cue, active, seed, sim_time_s).state == RECALLED for cue in cues]
    return recalled, [_cue_scores(cfg, h, times, cells, cue, active)[score] for cue in cues]


def _reached(cues: Sequence[tuple[int, int, int]], sched: protocol.Schedule, pr: dict, sim_time_s: float) -> bool:
    """Whether the run lasted past the persistence window of the last of a test's ``cues``."""
    return bool(cues) and sched.seconds(cues[-1][2]) + pr["persistence_window_s"] <= sim_time_s


def retention_metrics(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, final: dict[str, object],
                      sim_time_s: float, baseline: float, seed: int) -> dict[str, np.ndarray]:
    """Recall against time: every recall test (those during the hold, then the final one).

    A test counts as reached when the run lasted past its last cue's persistence window (the
    final one when ``final`` holds states). Recall is the recall test's (``recall_state``); the
    mean score is the overlap score of ``detection.recall_mode``, over the assemblies the test
    cued (every one, or some under ``protocol.retention_design = "once"``). ``retention_s`` per
    assembly: the longest delay after hold start up to which the assembly was recalled in every
    reached test that cued it (0 if not at the first, NaN if no such test was reached).
    """
    sched, pr = h.schedule, cfg["protocol"]
    count, score = len(h.memberships), success_score(cfg["detection"])
    delays = np.array([*pr["retention_delays_s"], sched.seconds(sched.hold_end - sched.imprint_end)])
    verdict = np.full((len(delays), count), np.nan)  # 1 recalled, 0 not, NaN not cued or not reached
    scores = np.full((len(delays), count), np.nan)
    for j, cues in enumerate(sched.tests[:-1]):
        if _reached(cues, sched, pr, sim_time_s):
            ks = [k for k, _, _ in cues]
            verdict[j, ks], scores[j, ks] = _verdicts(cfg, h, times, cells, cues, baseline, seed, sim_time_s)
    states: list[str | None] = list(final["recall_state"])  # type: ignore[call-overload]
    for k, state in enumerate(states):
        if state is not None:
            verdict[-1, k], scores[-1, k] = state == RECALLED, np.asarray(final[score])[k]
    tested = np.isfinite(verdict)
    reached = tested.any(axis=1)
    return {
        "retention_s": np.array([_leading_delay(delays[ok], v[ok]) for v, ok in zip(verdict.T, tested.T)]),
        "retention_delay_s": delays,
        "retention_recalled": np.where(reached, np.nansum(verdict, axis=1), -1).astype(int),
        "retention_tested": np.where(reached, tested.sum(axis=1), -1),
        "retention_score": np.array([np.nanmean(row) if np.isfinite(row).any() else np.nan for row in scores]),
    }


def _leading_delay(delays: np.ndarray, recalled: np.ndarray) -> float:
    """Delay (s) of the last of the tests recalled in a row from the first (0 if not the first; NaN if none)."""
    if not len(recalled):
        return float("nan")
    run = int(np.cumprod(recalled).sum())
    return float(delays[run - 1]) if run else 0.0


def age_metrics(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, baseline: float, seed: int,
                sim_time_s: float) -> dict[str, np.ndarray]:
    """Recall by memory age under blocked learning: the test after block ``j`` cues every assembly ``k <= j``,
    whose age is ``j - k`` blocks; its age in seconds runs from the end of ``k``'s last presentation to its cue.

    Per age (blocks, index 0 to count - 1): how many of the reached tests at that age recalled their assembly
    (-1 if none was reached), how many were reached, their mean overlap score and mean age in seconds. Fill values
    without blocked learning.
    """
    count, sched, pr = len(h.memberships), h.schedule, cfg["protocol"]
    out = {"age_recalled": np.full(count, -1), "age_tested": np.zeros(count, dtype=int),
           "age_score": np.full(count, np.nan), "age_s": np.full(count, np.nan)}
    if not sched.block_windows:
        out["age_tested"][:] = -1
        return out
    learned = {k: b for k, _, b in sched.imprint_windows}  # end of each assembly's last presentation (step)
    sums = np.zeros((3, count))
    for j in range(count):
        cues = [(k, a, b) for block, k, a, b in sched.block_windows if block == j]
        if not _reached(cues, sched, pr, sim_time_s):
            continue
        recalled, scores = _verdicts(cfg, h, times, cells, cues, baseline, seed, sim_time_s)
        for (k, a, _), hit, value in zip(cues, recalled, scores):
            out["age_tested"][j - k] += 1
            sums[:, j - k] += (hit, value, sched.seconds(a - learned[k]))
    tested = out["age_tested"] > 0
    out["age_recalled"][tested] = sums[0, tested]
    out["age_score"][tested], out["age_s"][tested] = sums[1:, tested] / out["age_tested"][tested]
    out["age_tested"][~tested] = -1
    return out


UPPER_SHARE_CLASSES = ("within", "between", "other")
"""Synapse classes of the ``upper_share_*`` variables: "other" is every E->E synapse in neither of the first two."""


def _drift(cfg: dict, h: Handles, rec: Recording, n_snap: int) -> dict[str, np.ndarray]:
    """Per-snapshot weight statistics: correlation with hold start, assembly contrast, pathway means, and (bistable
    reference weight) the share of each class of :data:`UPPER_SHARE_CLASSES` whose w_ref is in the upper state."""
    names = ("weight_correlation", "assembly_contrast", "weight_in", "weight_out", "weight_within", "weight_between",
             *(f"upper_share_{c}" for c in UPPER_SHARE_CLASSES))
    out = {n: np.full(n_snap, np.nan) for n in names}
    pre, post = h.wiring["ee"]
    classes = metrics.synapse_classes(pre, post, h.memberships)
    shares = {"within": classes["within"], "between": classes["between"],
              "other": ~(classes["within"] | classes["between"])}
    het = cfg["plasticity"]["heterosynaptic"]
    ref_snaps = rec.ref_snaps if het["w_ref_mode"] == "bistable" else []
    for s, w in enumerate(rec.snaps):
        out["weight_correlation"][s] = metrics.weight_correlation(w, rec.snaps[0])
        out["assembly_contrast"][s] = metrics.assembly_contrast(w, h.within)
        out["weight_in"][s], out["weight_out"][s], out["weight_within"][s] = \
            metrics.pathway_means(w, pre, post, h.memberships)
        out["weight_between"][s] = metrics.mean_over(w, classes["between"])
    for s, w_ref in enumerate(ref_snaps):
        for name in UPPER_SHARE_CLASSES:
            out[f"upper_share_{name}"][s] = metrics.upper_share(w_ref, shares[name], het["bistable_upper_weight"])
    return out


def score(cfg: dict, seed: int, engine: str, h: Handles, rec: Recording, start: float) -> dict[str, object]:
    """Metrics of a finished simulation; ``start`` is its ``time.perf_counter()`` at the beginning."""
    sim_time, weights = rec.sim_time_s, rec.weights
    sched, det = h.schedule, cfg["detection"]
    bin_s, n_exc = det["trace_bin_ms"] * 1e-3, len(h.exc)
    t_e, i_e, t_i = rec.t_exc, rec.i_exc, rec.t_inh
    settle_end, hold_end = sched.seconds(sched.settle_end), sched.seconds(sched.hold_end)
    baseline = baseline_rate(t_e, n_exc, sched)
    rate_exc = metrics.binned_rate(t_e, n_exc, bin_s, sim_time)
    onset = onset_in_schedule(rate_exc, baseline, det, sched, bin_s)
    hold_end_rate = metrics.mean_rate(t_e, n_exc, max(hold_end - det["smoothing_s"], 0.0), hold_end) \
        if sim_time >= hold_end else float("nan")
    end = sched.seconds(sched.end)
    tail_rate = metrics.mean_rate(t_e, n_exc, sched.seconds(protocol.recall_end(sched)), end) \
        if sim_time >= end - 0.5 * sched.dt_s else float("nan")
    recall = recall_metrics(cfg, h, t_e, i_e, baseline, bool(np.isfinite(tail_rate)), seed, sim_time)
    retention = retention_metrics(cfg, h, t_e, i_e, recall, sim_time, baseline, seed)
    ages = age_metrics(cfg, h, t_e, i_e, baseline, seed, sim_time)
    stuck = stuck_onsets(det, h, t_e, i_e, baseline, sim_time)
    learned = cfg["assemblies"]["imprint"] == "learned" and "imprint" in weights
    return {
        "outcome": metrics.outcome(onset, hold_end_rate, tail_rate, det["silence_hz"]),
        "engine": engine,
        "seed": int(seed),
        "runaway_onset_s": onset,
        **recall_counts(recall, det),
        "stuck_count": int(np.isfinite(stuck).sum()),
        "stuck_onset_s": stuck,
        "rate_exc_baseline_hz": baseline,
        "rate_inh_baseline_hz": metrics.mean_rate(t_i, len(h.inh), sched.seconds(sched.baseline_start), settle_end),
        "isi_cv_exc": metrics.isi_cv(t_e, i_e, sched.seconds(sched.baseline_start), settle_end),
        "rate_exc_hold_end_hz": hold_end_rate,
        "rate_exc_tail_hz": tail_rate,
        "imprint_contrast": metrics.assembly_contrast(weights["imprint"], h.within) if learned else float("nan"),
        "wall_time_s": time.perf_counter() - start - rec.setup_s,
        "setup_time_s": rec.setup_s,
        "simulated_time_s": sim_time,
        "n_synapses": int(h.n_synapses),
        "threads": threads_of(cfg),
        **recall,
        **retention,
        **ages,
        **_drift(cfg, h, rec, len(sched.snapshots)),
        "snapshot_time_s": np.array([sched.seconds(s) for s in sched.snapshots], dtype=float),
        "rate_exc_hz": rate_exc,
        "rate_inh_hz": metrics.binned_rate(t_i, len(h.inh), bin_s, sim_time),
    }
