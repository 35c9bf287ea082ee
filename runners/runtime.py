"""The runtime engines (cython, numpy): Brian2 runs the point's network in this process.

A :class:`RunawayWatch` network operation stops a point once its runaway onset is established,
with exactly the offline definition (:func:`capsweep.runners.scoring.onset_in_schedule`).

Within-point checkpoints (``execution.checkpoint_interval_s`` > 0): every interval of simulated
time the run writes the full state to one file per point (:class:`Checkpoint`): Brian2's
``Network.store`` (every state variable and the spikes recorded so far, undelivered spikes in
the delay queues, clocks, and the random state: numpy's generator and the cython engine's
random-number buffers), the watch's bin counts and the protocol position (the step reached,
weight copies taken). A point started again with the same config and seeds restores the last
checkpoint and continues; splitting a run at checkpoints changes no value, so a resumed point
gives bitwise the result of an uninterrupted run. The file is deleted once the run completes.
"""

from __future__ import annotations

import ctypes
import os
import pickle
import time
from collections.abc import Iterator
from typing import Any

import brian2 as b2
import numpy as np
from brian2.codegen.generators.cython_generator import _BUFFER_SIZE as RANDOM_BUFFER_SIZE

from .builds import code_fingerprint
from .checkpoints import checkpoint_root, interval_steps, point_key, refuse_foreign, stamp
from .model import Handles, build_network, records_w_ref
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


def _objects(objects: Any) -> Iterator[Any]:
    """Every Brian2 object of ``objects`` and, recursively, the objects they contain."""
    for obj in objects:
        yield obj
        yield from _objects(obj.contained_objects)


def _clock_names(network: b2.Network) -> dict[str, str]:
    """Name of each clock of ``network`` -> a name that does not depend on the process (its first object's name).

    Brian2 numbers the names of auto-named clocks by the instances created before, so a resumed
    point's clocks may be named differently from the ones that wrote the checkpoint.
    """
    users: dict[str, list[str]] = {}
    for obj in _objects(network.objects):
        users.setdefault(obj.clock.name, []).append(obj.name)
    return {clock: "clock of " + min(names) for clock, names in users.items()}


_LIBC = ctypes.CDLL(None)
_LIBC.malloc.restype = ctypes.c_void_p


def _random_buffers() -> dict[str, np.ndarray | None]:
    """Values of the cython engine's rand/randn buffers (None where not yet filled).

    Brian2's random state holds only the buffers' addresses, which mean nothing in another process.
    """
    device, out = b2.get_device(), {}
    for kind in ("rand", "randn"):
        address = int(getattr(device, f"{kind}_buffer")[0])
        out[kind] = np.ctypeslib.as_array((ctypes.c_double * RANDOM_BUFFER_SIZE).from_address(address)).copy() \
            if address else None
    return out


def _set_random_buffers(values: dict[str, np.ndarray | None]) -> None:
    """Refill the cython engine's rand/randn buffers with ``values``, in memory it frees itself when they run out.

    Buffers filled before (by an earlier point in this process) are left allocated: 160 kB each, once per resume.
    """
    device = b2.get_device()
    for kind, buffer in values.items():
        address = None
        if buffer is not None:
            address = _LIBC.malloc(buffer.nbytes)
            ctypes.memmove(address, buffer.ctypes.data, buffer.nbytes)
        getattr(device, f"{kind}_buffer")[0] = address or 0


class Checkpoint:
    """The checkpoint file of one point (units: steps of ``network.dt_ms``; path keyed by what fixes the run)."""

    def __init__(self, cfg: dict, seed: int, wiring_seed: int | None) -> None:
        self.path = checkpoint_root() / f"{point_key(cfg, seed, wiring_seed)}.pkl"
        self.every = interval_steps(cfg)
        self.stamp = stamp(code_fingerprint("runtime.py"))

    def steps(self, end: int) -> list[int]:
        """Steps before ``end`` at which the run writes a checkpoint (none when checkpoints are off)."""
        return list(range(self.every, end, self.every)) if self.every > 0 else []

    def save(self, network: b2.Network, progress: dict[str, Any]) -> None:
        """Write the network's state and ``progress`` (replacing the previous checkpoint in one rename)."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        partial = self.path.with_suffix(f".{os.getpid()}.partial")
        partial.unlink(missing_ok=True)
        network.store("network", filename=str(partial))
        with open(partial, "rb") as handle:
            state = pickle.load(handle)["network"]
        rename = _clock_names(network)
        state = {rename.get(name, name): value for name, value in state.items()}
        with open(partial, "wb") as handle:
            pickle.dump({"stamp": self.stamp, "network": state, "buffers": _random_buffers(), "progress": progress},
                        handle, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(partial, self.path)

    def restore(self, network: b2.Network) -> dict[str, Any] | None:
        """Put the network in its checkpointed state (random state included); its progress, or None if none.

        CapsweepError if another program wrote the checkpoint (:func:`capsweep.runners.checkpoints.refuse_foreign`).
        """
        if self.every <= 0 or not self.path.exists():
            return None
        with open(self.path, "rb") as handle:
            saved = pickle.load(handle)
        refuse_foreign(self.path, saved.get("stamp"), self.stamp)
        back = {canonical: name for name, canonical in _clock_names(network).items()}
        partial = self.path.with_suffix(f".{os.getpid()}.partial")
        with open(partial, "wb") as handle:
            pickle.dump({"network": {back.get(name, name): value for name, value in saved["network"].items()}},
                        handle, protocol=pickle.HIGHEST_PROTOCOL)
        network.restore("network", filename=str(partial), restore_random_state=True)
        partial.unlink()
        _set_random_buffers(saved["buffers"])
        progress: dict[str, Any] = saved["progress"]
        return progress

    def remove(self) -> None:
        """Delete the point's checkpoint (its run is complete)."""
        self.path.unlink(missing_ok=True)


class FirstStep:
    """Brian2 run report callback: the ``time.perf_counter()`` at which simulating first began.

    ``Network.run`` calls its report once its code is generated and compiled, before the first
    step; later calls (every report period, and later runs) are ignored.
    """

    def __init__(self) -> None:
        self.at: float | None = None

    def __call__(self, elapsed: Any, completed: float, start: Any, duration: Any) -> None:
        if self.at is None:
            self.at = time.perf_counter()


def _simulate(cfg: dict, network: b2.Network, ns: dict[str, Any], h: Handles, watch: RunawayWatch | None,
              checkpoint: Checkpoint, first: FirstStep) -> tuple[dict[str, np.ndarray], list[np.ndarray],
                                                                  list[np.ndarray]]:
    """Run the phases (from the last checkpoint, if any); return weights at named moments, the hold snapshots of
    ``w`` and those of ``w_ref`` (none for a fixed reference weight)."""
    sched, dt = h.schedule, h.schedule.dt_s
    marks = [("settle", sched.settle_end), ("imprint", sched.imprint_end)]
    marks += [(f"snap{i}", s) for i, s in enumerate(sched.snapshots)] + [("end", sched.end)]
    marks = sorted(marks + [("checkpoint", s) for s in checkpoint.steps(sched.end)], key=lambda m: m[1])
    progress = checkpoint.restore(network) or {"step": 0, "weights": {}, "snaps": [], "ref_snaps": [], "watch": None}
    resumed, weights, snaps, ref_snaps = progress["step"], progress["weights"], progress["snaps"], progress["ref_snaps"]
    if watch is not None and progress["watch"] is not None:
        watch.counts, watch.last, watch.baseline = progress["watch"]
    step = resumed
    for name, target in marks:
        if 0 < resumed and target <= resumed and name != "end":
            continue  # done before the checkpoint (marks at its step come before it in this order)
        if target > step:
            network.run((target - step) * dt * b2.second, namespace=ns, report=first, report_period=3600 * b2.second)
            step = target
        if watch is not None and np.isfinite(watch.onset):
            break
        if name == "imprint" or name.startswith("snap"):
            weights[name] = np.array(h.s_ee.w[:])
            if name.startswith("snap"):
                snaps.append(weights[name])
                if records_w_ref(cfg):
                    ref_snaps.append(np.array(h.s_ee.w_ref[:]))
        if name == "checkpoint":
            state = None if watch is None else (watch.counts, watch.last, watch.baseline)
            checkpoint.save(network, {"step": step, "weights": weights, "snaps": snaps, "ref_snaps": ref_snaps,
                                      "watch": state})
    checkpoint.remove()
    return weights, snaps, ref_snaps


def simulate(cfg: dict, seed: int, wiring_seed: int | None) -> tuple[Handles, Recording]:
    b2.set_device("runtime")
    b2.prefs.codegen.target = cfg["execution"]["engine"]
    b2.seed(seed % 2**32)
    start, first = time.perf_counter(), FirstStep()
    network, ns, h = build_network(cfg, seed, wiring_seed)
    watch = RunawayWatch(cfg, h, network) if cfg["execution"]["abort_on_runaway"] else None
    if watch is not None:
        network.add(watch.operation)
    weights, snaps, ref_snaps = _simulate(cfg, network, ns, h, watch, Checkpoint(cfg, seed, wiring_seed), first)
    sim_time = float(network.t / b2.second)  # network.t_ is not a float after network.stop()
    return h, Recording(np.asarray(h.mon_exc.t_[:]), np.asarray(h.mon_exc.i[:]), np.asarray(h.mon_inh.t_[:]),
                        sim_time, weights, snaps, (first.at or time.perf_counter()) - start, ref_snaps)
