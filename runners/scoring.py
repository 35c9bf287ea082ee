"""Score a finished simulation: what it recorded -> one value per store variable.

Both engines (:mod:`capsweep.runners.runtime`, :mod:`capsweep.runners.standalone`) hand back a
:class:`Recording`; :func:`score` turns it into the metrics of
``capsweep.results_schema.layout.VARIABLES`` (except ``predicted_outcome``). No Brian2 here.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

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


def onset_in_schedule(rate: np.ndarray, baseline: float, det: dict, sched: protocol.Schedule, bin_s: float) -> float:
    """Runaway onset (s) of an E rate trace (Hz, bins of ``bin_s`` s) under the point's detection settings."""
    threshold = metrics.runaway_threshold(det, baseline)
    return metrics.runaway_onset(rate, bin_s, det["smoothing_s"], threshold, det["runaway_hold_s"],
                                 protocol.cue_bins(sched, bin_s, len(rate)), sched.seconds(sched.settle_end))


def recall_metrics(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, baseline: float,
                    recalled: bool) -> dict[str, np.ndarray]:
    count, pr, det = len(h.memberships), cfg["protocol"], cfg["detection"]
    names = ("recall_quality", "persistence", "completion", "spurious", "cross_talk")
    out = {n: np.full(count, np.nan) for n in names}
    if not recalled:
        return out
    n_exc = len(h.exc)
    active = metrics.active_threshold(det, baseline)
    for k, a, b in h.schedule.cue_windows:
        t0, t1 = h.schedule.seconds(a) + pr["cue_skip_s"], h.schedule.seconds(b)
        counts = metrics.window_counts(times, cells, n_exc, t0, t1)
        after = metrics.window_counts(times, cells, n_exc, t1, t1 + pr["persistence_window_s"])
        mem, cued = h.memberships[k], h.cued[k]
        out["recall_quality"][k] = metrics.recall_quality(counts, mem, cued)
        out["persistence"][k] = metrics.recall_quality(after, mem, cued)
        out["completion"][k] = metrics.completion(counts, t1 - t0, mem, cued, active)
        out["spurious"][k] = metrics.spurious(counts, t1 - t0, mem, active)
        out["cross_talk"][k] = metrics.cross_talk(counts, h.memberships, k, cued)
    return out


def score(cfg: dict, seed: int, engine: str, h: Handles, rec: Recording, start: float) -> dict[str, object]:
    """Metrics of a finished simulation; ``start`` is its ``time.perf_counter()`` at the beginning."""
    sim_time, weights, snaps = rec.sim_time_s, rec.weights, rec.snaps
    sched, det = h.schedule, cfg["detection"]
    bin_s, n_exc = det["trace_bin_ms"] * 1e-3, len(h.exc)
    t_e, i_e, t_i = rec.t_exc, rec.i_exc, rec.t_inh
    settle_end, hold_end = sched.seconds(sched.settle_end), sched.seconds(sched.hold_end)
    baseline = metrics.mean_rate(t_e, n_exc, 0.0, settle_end)
    rate_exc = metrics.binned_rate(t_e, n_exc, bin_s, sim_time)
    onset = onset_in_schedule(rate_exc, baseline, det, sched, bin_s)
    hold_end_rate = metrics.mean_rate(t_e, n_exc, max(hold_end - det["smoothing_s"], 0.0), hold_end) \
        if sim_time >= hold_end else float("nan")
    recalled = sim_time >= sched.seconds(sched.end) - 0.5 * sched.dt_s
    recall = recall_metrics(cfg, h, t_e, i_e, baseline, recalled)

    n_snap = len(sched.snapshots)
    w_corr, contrast = np.full(n_snap, np.nan), np.full(n_snap, np.nan)
    for s, w in enumerate(snaps):
        w_corr[s] = metrics.weight_correlation(w, snaps[0])
        contrast[s] = metrics.assembly_contrast(w, h.within)
    learned = cfg["assemblies"]["imprint"] == "learned" and "imprint" in weights
    return {
        "outcome": metrics.outcome(onset, hold_end_rate, det["silence_hz"]),
        "engine": engine,
        "seed": int(seed),
        "runaway_onset_s": onset,
        "recalled_count": int(np.sum(recall["recall_quality"] >= det["recall_threshold"])),
        "rate_exc_baseline_hz": baseline,
        "rate_inh_baseline_hz": metrics.mean_rate(t_i, len(h.inh), 0.0, settle_end),
        "isi_cv_exc": metrics.isi_cv(t_e, i_e, 0.0, settle_end),
        "rate_exc_hold_end_hz": hold_end_rate,
        "imprint_contrast": metrics.assembly_contrast(weights["imprint"], h.within) if learned else float("nan"),
        "wall_time_s": time.perf_counter() - start,
        "simulated_time_s": sim_time,
        "n_synapses": int(h.n_synapses),
        **recall,
        "weight_correlation": w_corr,
        "assembly_contrast": contrast,
        "snapshot_time_s": np.array([sched.seconds(s) for s in sched.snapshots], dtype=float),
        "rate_exc_hz": rate_exc,
        "rate_inh_hz": metrics.binned_rate(t_i, len(h.inh), bin_s, sim_time),
    }
