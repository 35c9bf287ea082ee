"""Protocol phases of one point: settle -> (imprint) -> hold -> recall, on the integration grid.

Times are kept as whole integration steps (``network.dt_ms``) so that phase boundaries, cue
windows and snapshots are exact. Plasticity is on in every phase. Stimuli are described by a
rate table (Hz) over time and *channels*: channel ``k`` is the imprint input of assembly ``k``
(learned mode), channel ``count + k`` the cue input of assembly ``k``.

Order of the imprint phase (``protocol.imprint_order``): *interleaved*, assemblies are presented
in turn (0, 1, ..., count-1) and this round is repeated ``imprint_repeats`` times; *blocked*, all
``imprint_repeats`` presentations of assembly 0, then a recall test of every assembly learned so
far, then assembly 1, and so on (a *block* is one assembly's presentations and the test after
them), so that the store holds recall by memory age. Each presentation is ``imprint_on_s`` of
input followed by ``imprint_off_s`` of background. Recall tests at ``retention_delays_s`` after
hold start (during the hold) and one after the hold; in a test each assembly it covers is cued once
for ``cue_duration_s``, followed by ``cue_gap_s`` of background, in an order drawn per point (so
that assembly index is not confounded with test time while plasticity acts). Which assemblies a
test covers follows ``protocol.retention_design``: every assembly in every test ("repeated"), or
each assembly in exactly one of the tests, dealt in cue order ("once"; so no test rehearses what
a later one measures). A background-only tail follows the last cue, long enough
(``detection.runaway_hold_s + detection.smoothing_s``) for a runaway set off by that cue to be
established before the run ends.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import reduce

import numpy as np


@dataclass(frozen=True)
class Schedule:
    """Phase boundaries of one point, in integration steps of ``dt_s`` seconds."""

    dt_s: float
    settle_end: int
    imprint_windows: tuple[tuple[int, int, int], ...]  # (assembly, start, stop)
    imprint_end: int
    hold_end: int
    snapshots: tuple[int, ...]
    cue_windows: tuple[tuple[int, int, int], ...]  # (assembly, start, stop), in the order cued
    end: int
    imprint_on: int = 0  # steps of input per presentation (learned)
    imprint_slot: int = 0  # steps from one presentation's start to the next (on + off)
    cue_steps: int = 0  # steps of one cue
    cue_period: int = 0  # steps from one cue's start to the next (cue + gap)
    baseline_start: int = 0  # first step of the baseline window (which ends at settle_end)
    retention_windows: tuple[tuple[int, int, int], ...] = ()  # (assembly, start, stop) of recall tests during hold
    retention_starts: tuple[int, ...] = ()  # first step of each recall test during the hold
    block_windows: tuple[tuple[int, int, int, int], ...] = ()  # (block, assembly, start, stop) of blocked tests

    @property
    def test_starts(self) -> tuple[int, ...]:
        """First step of every recall test: those during the hold, then the final one at hold end."""
        return (*self.retention_starts, self.hold_end)

    @property
    def tests(self) -> tuple[tuple[tuple[int, int, int], ...], ...]:
        """The cues (assembly, start, stop) of each recall test: those during the hold, then the final one."""
        ends = (*self.test_starts[1:], self.end)
        return tuple(tuple(c for c in self.all_cues if start <= c[1] < stop)
                     for start, stop in zip(self.test_starts, ends))

    @property
    def all_cues(self) -> tuple[tuple[int, int, int], ...]:
        """(assembly, start, stop) of every cue in time order: blocked learning's tests, the hold's, the final."""
        return tuple((k, a, b) for _, k, a, b in self.block_windows) + self.retention_windows + self.cue_windows

    def seconds(self, step: int) -> float:
        """Simulated time (s) of a step index."""
        return step * self.dt_s


SCHEDULE_KEYS: tuple[str, ...] = (
    "network.dt_ms", "assemblies.count", "assemblies.imprint", "protocol.", "detection.runaway_hold_s",
    "detection.smoothing_s", "detection.baseline_start_s",
)
"""The config keys :func:`schedule` reads (``"protocol."``: every key of that table): a point's timeline and length
depend on nothing else, so a sweep computes them once per distinct value of these."""


def _steps(seconds: float, dt_s: float) -> int:
    return int(round(seconds / dt_s))


def schedule(cfg: dict, cue_order: Sequence[int] | None = None) -> Schedule:
    """Phase boundaries of the point described by ``cfg`` (no early abort).

    ``cue_order`` lists the assemblies in the order they are cued (default 0, 1, ...); see
    :func:`cue_order`. The end does not depend on it.
    """
    dt = cfg["network"]["dt_ms"] * 1e-3
    pr, count = cfg["protocol"], cfg["assemblies"]["count"]
    on, off = _steps(pr["imprint_on_s"], dt), _steps(pr["imprint_off_s"], dt)
    cue, gap = _steps(pr["cue_duration_s"], dt), _steps(pr["cue_gap_s"], dt)
    order = list(range(count)) if cue_order is None else list(cue_order)

    def test(start: int, covered: Sequence[int]) -> tuple[tuple[int, int, int], ...]:
        return tuple((k, start + slot * (cue + gap), start + slot * (cue + gap) + cue)
                     for slot, k in enumerate(k for k in order if k in covered))

    settle_end = _steps(pr["settle_s"], dt)
    imprint, blocks, imprint_end = _imprint(cfg, settle_end, on, off, lambda start, j: test(start, range(j + 1)))
    hold_end = imprint_end + _steps(pr["hold_s"], dt)
    n_snap = pr["snapshots"]
    snaps = tuple(imprint_end + round(i * (hold_end - imprint_end) / (n_snap - 1)) for i in range(n_snap))
    retention_starts = tuple(imprint_end + _steps(d, dt) for d in pr["retention_delays_s"])
    covered = tested_in(pr["retention_design"], order, len(retention_starts) + 1)
    det = cfg["detection"]
    tail = max(_steps(det["runaway_hold_s"] + det["smoothing_s"], dt) - gap, 0) if count else 0
    end = hold_end + len(covered[-1]) * (cue + gap) + tail
    return Schedule(dt, settle_end, imprint, imprint_end, hold_end, snaps, test(hold_end, covered[-1]), end,
                    on, on + off, cue, cue + gap, _steps(det["baseline_start_s"], dt),
                    tuple(w for start, ks in zip(retention_starts, covered) for w in test(start, ks)),
                    retention_starts, blocks)


Cues = tuple[tuple[int, int, int], ...]


def _imprint(cfg: dict, start: int, on: int, off: int, block_test: Callable[[int, int], Cues]
             ) -> tuple[Cues, tuple[tuple[int, int, int, int], ...], int]:
    """Imprint windows (assembly, start, stop), blocked learning's test cues (block, assembly, start, stop) and the
    step at which imprinting ends, from step ``start``; ``block_test(step, j)`` lays out the test after block j."""
    pr, count = cfg["protocol"], cfg["assemblies"]["count"]
    if cfg["assemblies"]["imprint"] != "learned":
        return (), (), start
    t, imprint, blocks = start, [], []
    blocked = pr["imprint_order"] == "blocked"
    rounds = [[k] * pr["imprint_repeats"] for k in range(count)] if blocked \
        else [list(range(count))] * pr["imprint_repeats"]
    for j, presented in enumerate(rounds):
        for k in presented:
            imprint.append((k, t, t + on))
            t += on + off
        if blocked:
            cues = block_test(t, j)
            blocks += [(j, *c) for c in cues]
            t = cues[-1][2] + _steps(pr["cue_gap_s"], cfg["network"]["dt_ms"] * 1e-3)  # the last cue's gap
    return tuple(imprint), tuple(blocks), t


def tested_in(design: str, order: Sequence[int], tests: int) -> list[list[int]]:
    """Assemblies each of ``tests`` recall tests (the hold's, then the final one) covers under
    ``protocol.retention_design``: all of ``order`` in each ("repeated"), or ``order`` dealt round robin so that
    each assembly is tested once ("once"; the assembly cued ``i``-th goes to test ``i mod tests``)."""
    if design == "once":
        return [[k for i, k in enumerate(order) if i % tests == j] for j in range(tests)]
    return [list(order) for _ in range(tests)]


def cue_order(count: int, seed: int) -> list[int]:
    """Order (assembly indices) in which a point cues its ``count`` assemblies: a permutation drawn from ``seed``."""
    return [int(k) for k in np.random.default_rng([seed, 2]).permutation(count)]


def recall_end(sched: Schedule) -> int:
    """Step at which the last cue's gap ends and the background-only tail begins."""
    return sched.hold_end + len(sched.cue_windows) * sched.cue_period


def total_duration_s(cfg: dict) -> float:
    """Planned simulated duration (s) of a point, without early abort."""
    s = schedule(cfg)
    return s.seconds(s.end)


def stimulus_table(cfg: dict, sched: Schedule) -> tuple[np.ndarray, int]:
    """Extra input rate (Hz) per time row and channel, and the row length in integration steps.

    The row length is the greatest common divisor of all stimulus boundaries, so the table is
    exact and small. Shape: ``(rows, 2 * count)``; rows cover ``[0, end)``.
    """
    count = cfg["assemblies"]["count"]
    windows = [(k, a, b) for k, a, b in sched.imprint_windows] + [(count + k, a, b) for k, a, b in sched.all_cues]
    edges = [sched.end] + [e for _, a, b in windows for e in (a, b)]
    row = reduce(math.gcd, [e for e in edges if e > 0], 0) or 1
    table = np.zeros((max(sched.end // row, 1), 2 * count))
    pr = cfg["protocol"]
    for channel, a, b in windows:
        table[a // row: b // row, channel] = pr["imprint_rate_hz"] if channel < count else pr["cue_rate_hz"]
    return table, row


def test_windows(cue_start_s: float, cue_stop_s: float, pr: dict, mode: str) -> tuple[tuple[float, float],
                                                                                 tuple[float, float]]:
    """Recall window and pre-cue window ``[t0, t1)`` (s) of a cue from ``cue_start_s`` to ``cue_stop_s``.

    Recall window: the cue minus its first ``protocol.cue_skip_s`` (``mode`` "cued"), or the
    ``protocol.persistence_window_s`` after the cue ("persistent"). Pre-cue window: as long as the
    recall window and ending at the cue's start (in the background gap after the previous cue).
    """
    if mode == "cued":
        recall = (cue_start_s + pr["cue_skip_s"], cue_stop_s)
    else:
        recall = (cue_stop_s, cue_stop_s + pr["persistence_window_s"])
    return recall, (cue_start_s - (recall[1] - recall[0]), cue_start_s)


def background_starts(sched: Schedule, end_s: float, recall: tuple[float, float],
                      pre: tuple[float, float]) -> list[tuple[float, float]]:
    """Intervals ``[lo, hi]`` (s) of virtual cue starts whose windows lie in background-only time.

    ``recall``/``pre`` are the windows' offsets (s) from a cue start (see :func:`test_windows`);
    background-only time runs from hold start to ``end_s`` and overlaps no cue of any recall test.
    """
    spans, start = [], sched.seconds(sched.imprint_end)
    for a, b in sorted((sched.seconds(a), sched.seconds(b)) for _, a, b in sched.all_cues):
        spans.append((start - pre[0], a - recall[1]))
        start = max(start, b)
    spans.append((start - pre[0], end_s - recall[1]))
    return [(lo, hi) for lo, hi in spans if hi > lo]


def cue_bins(sched: Schedule, bin_s: float, n_bins: int) -> np.ndarray:
    """Boolean mask of the rate-trace bins (width ``bin_s`` s) that overlap any cue window."""
    mask = np.zeros(n_bins, dtype=bool)
    for _, a, b in sched.all_cues:
        first = int(np.floor(sched.seconds(a) / bin_s + 1e-9))
        last = int(np.ceil(sched.seconds(b) / bin_s - 1e-9))
        mask[first:min(last, n_bins)] = True
    return mask


def freeze_time_s(cfg: dict, sched: Schedule | None = None) -> float:
    """Simulated time (s) from which weights stop changing: the end of imprinting with
    ``plasticity.freeze_after_imprint``, else never (inf). ``sched`` saves recomputing the point's schedule."""
    if not cfg["plasticity"]["freeze_after_imprint"]:
        return math.inf
    sched = sched or schedule(cfg)
    return sched.seconds(sched.imprint_end)
