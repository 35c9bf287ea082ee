"""The runtime engines (cython, numpy): Brian2 runs the point's network in this process.

A :class:`RunawayWatch` network operation stops a point once its runaway onset is established,
with exactly the offline definition (:func:`capsweep.runners.scoring.onset_in_schedule`).
"""

from __future__ import annotations

from typing import Any

import brian2 as b2
import numpy as np

from .model import Handles, build_network
from .scoring import Recording, baseline_rate, onset_in_schedule

CHECK_INTERVAL_S = 0.1
"""How often (simulated s) the early-abort watch re-evaluates runaway onset."""


class RunawayWatch:
    """Counts E spikes per trace bin during the run and stops the network once onset is established.

    Uses exactly the offline definition (:func:`capsweep.runners.metrics.runaway_onset`) on the bins
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
            self.baseline = baseline_rate(np.asarray(self.handles.mon_exc.t_[:]), n_exc, sched)
        rate = np.asarray(self.counts, dtype=float) / (n_exc * self.bin_s)
        self.onset = onset_in_schedule(rate, self.baseline, self.det, sched, self.bin_s)
        if np.isfinite(self.onset):
            self.network.stop()


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


def simulate(cfg: dict, seed: int, wiring_seed: int | None) -> tuple[Handles, Recording]:
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


