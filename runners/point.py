"""Run one sweep point: build, simulate the protocol phases, score it.

``run_point(cfg, seed, wiring_seed=None)`` returns one entry per result variable of
``results_schema.layout.VARIABLES`` except ``predicted_outcome``. The runtime engines
(cython, numpy) simulate here; ``execution.engine = "standalone"`` goes to
:mod:`runners.standalone`, which falls back to cython for points it cannot express.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import brian2 as b2
import numpy as np

from runners import metrics, protocol
from runners.model import Handles, build_network

@dataclass
class Recording:
    """What a simulation leaves for scoring: spikes before ``sim_time_s`` and E->E weights."""

    t_exc: np.ndarray  # s
    i_exc: np.ndarray
    t_inh: np.ndarray  # s
    sim_time_s: float
    weights: dict[str, np.ndarray]  # "imprint" and "snap{i}" when reached
    snaps: list[np.ndarray]  # hold snapshots reached, in order


CHECK_INTERVAL_S = 0.1
"""How often (simulated s) the early-abort watch re-evaluates runaway onset."""


class RunawayWatch:
    """Counts E spikes per trace bin during the run and stops the network once onset is established.

    Uses exactly the offline definition (:func:`runners.metrics.runaway_onset`) on the bins
    recorded so far, so the onset it sees is the one the full run would report.
    """

    def __init__(self, cfg: dict, handles: Handles, network: b2.Network) -> None:
        det = cfg["detection"]
        self.det, self.handles, self.network = det, handles, network
        self.bin_s = det["trace_bin_ms"] * 1e-3
        self.counts: list[int] = []
        self.last = 0
        self.every = max(1, int(round(CHECK_INTERVAL_S / self.bin_s)))
        self.onset = float("nan")
        self.baseline: float | None = None
        self.operation = b2.NetworkOperation(self._tick, dt=self.bin_s * b2.second, when="start",
                                             name="runaway_watch")

    def _tick(self) -> None:
        total = self.handles.mon_exc.num_spikes
        if self.network.t_ > 0:
            self.counts.append(total - self.last)
        self.last = total
        sched = self.handles.schedule
        if len(self.counts) % self.every or self.network.t_ < sched.seconds(sched.settle_end):
            return
        n_exc = len(self.handles.exc)
        if self.baseline is None:
            self.baseline = metrics.mean_rate(self.handles.mon_exc.t_[:], n_exc, 0.0, sched.seconds(sched.settle_end))
        rate = np.asarray(self.counts, dtype=float) / (n_exc * self.bin_s)
        self.onset = _onset(rate, self.baseline, self.det, sched, self.bin_s)
        if np.isfinite(self.onset):
            self.network.stop()


def _onset(rate: np.ndarray, baseline: float, det: dict, sched: protocol.Schedule, bin_s: float) -> float:
    threshold = metrics.runaway_threshold(baseline, det["runaway_factor"], det["runaway_floor_hz"])
    return metrics.runaway_onset(rate, bin_s, det["smoothing_s"], threshold, det["runaway_hold_s"],
                                 protocol.cue_bins(sched, bin_s, len(rate)), sched.seconds(sched.settle_end))


def _simulate(cfg: dict, network: b2.Network, ns: dict[str, Any], h: Handles,
              watch: RunawayWatch | None) -> tuple[dict[str, np.ndarray], list[np.ndarray]]:
    """Run the phases; return weights at named moments and the hold snapshots taken."""
    sched, dt = h.schedule, h.schedule.dt_s
    marks = [("settle", sched.settle_end), ("imprint", sched.imprint_end)]
    marks += [(f"snap{i}", s) for i, s in enumerate(sched.snapshots)] + [("end", sched.end)]
    weights, snaps = {}, []
    step = 0
    for name, target in marks:
        if target > step:
            network.run((target - step) * dt * b2.second, namespace=ns)
            step = target
        if watch is not None and np.isfinite(watch.onset):
            break
        if name == "imprint" or name.startswith("snap"):
            weights[name] = np.array(h.s_ee.w[:])
            if name.startswith("snap"):
                snaps.append(weights[name])
    return weights, snaps


def _recall_metrics(cfg: dict, h: Handles, times: np.ndarray, cells: np.ndarray, baseline: float,
                    recalled: bool) -> dict[str, np.ndarray]:
    count, pr, det = len(h.memberships), cfg["protocol"], cfg["detection"]
    names = ("recall_quality", "persistence", "completion", "spurious", "cross_talk")
    out = {n: np.full(count, np.nan) for n in names}
    if not recalled:
        return out
    n_exc = len(h.exc)
    active = max(det["active_factor"] * baseline, det["active_floor_hz"]) if np.isfinite(baseline) \
        else det["active_floor_hz"]
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


def _simulate_runtime(cfg: dict, seed: int, wiring_seed: int | None) -> tuple[Handles, Recording]:
    b2.set_device("runtime")
    b2.prefs.codegen.target = cfg["execution"]["engine"]
    b2.seed(seed % 2**32)
    network, ns, h = build_network(cfg, seed, wiring_seed)
    watch = RunawayWatch(cfg, h, network) if cfg["execution"]["abort_on_runaway"] else None
    if watch is not None:
        network.add(watch.operation)
    weights, snaps = _simulate(cfg, network, ns, h, watch)
    sim_time = float(network.t / b2.second)  # network.t_ is not a float after network.stop()
    return h, Recording(np.asarray(h.mon_exc.t_[:]), np.asarray(h.mon_exc.i[:]), np.asarray(h.mon_inh.t_[:]),
                        sim_time, weights, snaps)


def run_point(cfg: dict, seed: int, wiring_seed: int | None = None) -> dict[str, object]:
    """Simulate one point and return its metrics (see ``results_schema.layout.VARIABLES``).

    ``cfg`` is the nested, fully resolved config; ``wiring_seed`` (default ``seed``) draws
    assembly membership and connectivity, ``seed`` cued members, initial voltages and Brian2's
    RNG. Same cfg and seeds give identical results with the same engine. The ``engine`` entry
    says which engine ran the point (``cython`` when a standalone point fell back).
    """
    start = time.perf_counter()
    engine = cfg["execution"]["engine"]
    if engine == "standalone":
        from runners import standalone

        if standalone.unsupported(cfg) is None:
            h, rec = standalone.simulate(cfg, seed, wiring_seed)
            return _score(cfg, seed, engine, h, rec, start)
        engine = "cython"
        cfg = {**cfg, "execution": {**cfg["execution"], "engine": engine}}
    h, rec = _simulate_runtime(cfg, seed, wiring_seed)
    return _score(cfg, seed, engine, h, rec, start)


def _score(cfg: dict, seed: int, engine: str, h: Handles, rec: Recording, start: float) -> dict[str, object]:
    """Metrics of a finished simulation; ``start`` is its ``time.perf_counter()`` at the beginning."""
    sim_time, weights, snaps = rec.sim_time_s, rec.weights, rec.snaps
    sched, det = h.schedule, cfg["detection"]
    bin_s, n_exc = det["trace_bin_ms"] * 1e-3, len(h.exc)
    t_e, i_e, t_i = rec.t_exc, rec.i_exc, rec.t_inh
    settle_end, hold_end = sched.seconds(sched.settle_end), sched.seconds(sched.hold_end)
    baseline = metrics.mean_rate(t_e, n_exc, 0.0, settle_end)
    rate_exc = metrics.binned_rate(t_e, n_exc, bin_s, sim_time)
    onset = _onset(rate_exc, baseline, det, sched, bin_s)
    hold_end_rate = metrics.mean_rate(t_e, n_exc, max(hold_end - det["smoothing_s"], 0.0), hold_end) \
        if sim_time >= hold_end else float("nan")
    recalled = sim_time >= sched.seconds(sched.end) - 0.5 * sched.dt_s
    recall = _recall_metrics(cfg, h, t_e, i_e, baseline, recalled)

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
