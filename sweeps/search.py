"""Adaptive capacity search: per condition (combination of the other axes), run only the counts that decide the
capacity.

A sweep whose count axis says ``search = {low, high, start, method}`` lays out every count from
low to high in the store, but runs only the counts that decide each condition's capacity. A count
*passes* when its replicates succeed in at least ``MIN_FRACTION`` of the done ones (the rule of
the capacity table, :func:`capsweep.sweeps.success.count_passes`). Three methods:

- ``scan`` (default, exact): the capacity is the largest k whose every count <= k passes, so the
  counts 1..capacity + 1 are exactly what certifies it, and nothing above the first failing count
  is needed. The scan runs every count from the bottom up to ``start`` at once (a seed, e.g. the
  prescreen's stability bound, buys parallel wall time), then one count at a time, and stops
  at the first failing count. It gives the full grid's capacity on any grid.
- ``grow`` (open upper end): probe the start count, double while every probe passes (up to
  ``high``, the ceiling laid out in the store), halve while none does, then close in on the
  geometric midpoint of the largest passing and the smallest failing count until they are adjacent
  (:func:`capsweep.sweeps.sequential.next_count`). A grown capacity is bracketed by a passing and a
  failing count, or censored at ``high`` or ``low``. It assumes monotone success as bisect does.
- ``bisect`` (fewer points for large capacities, assumes success falls monotonically with the
  count): keep the largest passing index ``lo`` (-1: none yet) and the smallest failing index
  ``hi`` (len: none yet), probe the start count first, gallop up (start + 1, + 3, + 7, ...) while
  nothing failed, gallop down (start - 1, - 3, - 7, ...) while nothing passed, then bisect until
  ``hi - lo == 1``. Counts it skipped below the capacity are assumed to pass: on a noisy grid (a
  failing count below a passing one) it can report more than the full grid would.

Replicates where they decide: with ``first_replicates`` set, a probed count runs its first
``first_replicates`` replicates; while their 95 % Wilson interval still holds the pass fraction, it
runs ``more_replicates`` more (always the next replicate indices), up to every replicate laid out
(the sweep's ``replicates``) (:func:`capsweep.sweeps.sequential.replicates_to_add`). The count then
passes or fails on all its decided replicates. Replicates never needed get status ``unneeded``.

Every step is a function of the verdicts stored so far, so a killed search resumes exactly where
it stopped and gives the same capacities. When a condition closes, its points never run get status
``unneeded``; the capacity table infers whether their counts pass by monotonicity (pass below a passing
count, fail above a failing one). Passes that contradict monotonicity (a pass above a failure, e.g.
after ``--retry-failed``) stop a bisect at once; the capacity table flags the condition non-monotone.

Words: a point's *verdict* is whether it succeeded; a count *passes* or fails from its replicates' verdicts.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..flags import DONE, FAILED, OUTCOMES, STATUSES, UNNEEDED
from .sequential import Tally, next_count, replicates_to_add
from .success import count_passes, leading_passes, succeeds

Verdict = bool | None
"""Success of one point: True, False, or None when it crashed (left out of the count's fraction)."""


@dataclass
class ConditionSearch:
    """The search of one condition: which count indices passed or failed, and what to probe next."""

    n_counts: int
    start: int  # index of the count probed first (bisect) or scanned up to at once (scan)
    method: str = "scan"  # one of SEARCH_METHODS
    passes: dict[int, bool] = field(default_factory=dict)  # count index -> whether the count passes
    first_count: int = 1  # the count at index 0 (a searched axis holds every count from low to high)

    def bounds(self) -> tuple[int, int]:
        """(largest passing index or -1, smallest failing index or n_counts)."""
        lo = max((k for k, ok in self.passes.items() if ok), default=-1)
        hi = min((k for k, ok in self.passes.items() if not ok), default=self.n_counts)
        return lo, hi

    def next_probes(self) -> list[int]:
        """Count indices to run now (empty when the condition's capacity is decided)."""
        if self.method == "scan":
            return self._scan()
        probe = self._grow() if self.method == "grow" else self._bisect()
        return [] if probe is None else [probe]

    def _grow(self) -> int | None:
        """Next index of the open-ended search (:func:`capsweep.sweeps.sequential.next_count`), None when decided."""
        low = self.first_count
        count = next_count({low + k: ok for k, ok in self.passes.items()}, low + self.start,
                           low + self.n_counts - 1, floor=low)
        return None if count is None else count - low

    def _scan(self) -> list[int]:
        """Every undecided index from the bottom up to max(start, first index not yet known to pass)."""
        lead = leading_passes(self.passes.get(k) for k in range(self.n_counts))
        if lead == self.n_counts or self.passes.get(lead) is False:
            return []
        return [k for k in range(min(max(self.start, lead), self.n_counts - 1) + 1) if k not in self.passes]

    def _bisect(self) -> int | None:
        """Next index of the bracket-and-bisect search, or None when decided."""
        lo, hi = self.bounds()
        if hi - lo <= 1:
            return None
        if not self.passes:
            return self.start
        if hi == self.n_counts:
            return min(self.start + 2 * (lo - self.start) + 1, self.n_counts - 1)
        if lo == -1:
            return max(2 * hi - self.start - 1, 0)
        return (lo + hi) // 2


NO_VERDICT, CRASHED = -2, -1
"""Codes of :attr:`SearchRun.verdicts` besides 0 (failed) and 1 (succeeded): not finished yet; crashed (None)."""


@dataclass
class SearchRun:
    """Every condition's search over one sweep's points, fed with point verdicts as they are stored.

    Points are index tuples (position along each axis, then the replicate); their state lives in
    arrays over the grid shape, so a search over many points holds no object per point.
    """

    count_pos: int  # position of the count axis in a point's index
    counts: tuple[int, ...]  # the count axis's values
    conditions: dict[tuple[int, ...], ConditionSearch]
    verdicts: np.ndarray  # int8 over the grid shape: 1 succeeded, 0 failed, CRASHED, NO_VERDICT
    taken: np.ndarray  # bool over the grid shape: submitted, or marked unneeded
    closed: set[tuple[int, ...]] = field(default_factory=set)  # conditions whose capacity is decided
    replicate_rule: tuple[int, int] | None = None  # (first, more) replicates per probed count; None: all at once

    def replicates(self, key: tuple[int, ...], k: int) -> list[tuple[int, ...]]:
        """The points of condition ``key`` at count index ``k``: one per replicate."""
        where = self.count_pos
        return [(*key[:where], k, *key[where:], r) for r in range(self.verdicts.shape[-1])]

    def record(self, index: tuple[int, ...], verdict: Verdict) -> tuple[int, ...]:
        """The point at ``index`` finished with ``verdict``; returns its condition."""
        self.verdicts[index] = CRASHED if verdict is None else int(verdict)
        return condition_key(index, self.count_pos)

    def record_result(self, index: tuple[int, ...], result: Mapping[str, Any] | None) -> tuple[int, ...]:
        """The point at ``index`` finished with ``result`` (its store values; None when it failed); returns its
        condition."""
        count = self.counts[index[self.count_pos]]
        return self.record(index, None if result is None else
                           bool(succeeds(result["outcome"], result["recalled_count"], result["stuck_count"], count)))

    def advance(self, keys: Iterable[tuple[int, ...]] | None = None) -> tuple[list[tuple[int, ...]],
                                                                              list[tuple[int, ...]]]:
        """For the conditions ``keys`` (default: all), the points to submit now and the points newly unneeded.

        An open condition wants the unfinished, unsubmitted replicates of its next probes; a condition that
        has just closed gives up every point it never ran (they are counted as marked unneeded).
        """
        wanted: list[tuple[int, ...]] = []
        unneeded: list[tuple[int, ...]] = []
        for key in self.conditions if keys is None else keys:
            search = self.conditions[key]
            probes = self._advance(key, search)
            if probes:
                fresh = [i for k in probes for i in self._in_play(key, k) if self._untouched(i)]
                wanted += fresh
            elif key not in self.closed:
                self.closed.add(key)
                fresh = [i for k in range(search.n_counts) for i in self.replicates(key, k) if self._untouched(i)]
                unneeded += fresh
            else:
                continue
            for index in fresh:
                self.taken[index] = True
        return wanted, unneeded

    def _in_play(self, key: tuple[int, ...], k: int) -> list[tuple[int, ...]]:
        """The replicates of count index ``k`` that run: all, or under ``replicate_rule`` the first ones and more
        while their decided verdicts leave the count undecided (a function of the stored verdicts: resumes exactly).
        """
        indices = self.replicates(key, k)
        if self.replicate_rule is None:
            return indices
        first, more = self.replicate_rule
        n = min(first, len(indices))
        while n < len(indices):
            verdicts = [int(self.verdicts[i]) for i in indices[:n]]
            if NO_VERDICT in verdicts:
                break
            done = [v for v in verdicts if v != CRASHED]
            tally = Tally(sum(done), len(done), len(verdicts) - len(done))
            added = replicates_to_add({k: tally}, batch=more, cap=len(indices)).get(k, 0)
            if not added:
                break
            n += added
        return indices[:n]

    def _untouched(self, index: tuple[int, ...]) -> bool:
        """Neither finished, submitted nor marked unneeded."""
        return bool(self.verdicts[index] == NO_VERDICT and not self.taken[index])

    def _advance(self, key: tuple[int, ...], search: ConditionSearch) -> list[int]:
        """Record whether the finished probes pass; the condition's probes still open (empty: decided)."""
        while probes := search.next_probes():
            still_open = []
            for probe in probes:
                verdicts = [int(self.verdicts[i]) for i in self._in_play(key, probe)]
                if NO_VERDICT in verdicts:
                    still_open.append(probe)
                    continue
                done = [v for v in verdicts if v != CRASHED]
                search.passes[probe] = bool(count_passes(sum(done), len(done)))  # all crashed: a failing count
            if len(still_open) == len(probes):
                return still_open
        return []


def plan_search(counts: tuple[int, ...], count_pos: int, starts: Mapping[tuple[int, ...], int], method: str,
                status: np.ndarray, outcome: np.ndarray, recalled: np.ndarray, stuck: np.ndarray,
                retry_failed: bool, replicate_rule: tuple[int, int] | None = None) -> SearchRun:
    """A SearchRun over a grid whose count axis (values ``counts``, every count from low to high) sits at
    ``count_pos``, with the verdicts already stored (status/outcome/recalled_count/stuck_count codes, over the grid
    shape).

    ``starts`` maps each condition key to its start index; ``method`` is one of SEARCH_METHODS;
    ``replicate_rule`` (first, more) replicates per probed count, None for all at once.
    Failed points count as crashed verdicts unless ``retry_failed``; unneeded points as not yet run.
    """
    shape = status.shape
    count = np.reshape(counts, [len(counts) if d == count_pos else 1 for d in range(len(shape))])
    done = status == STATUSES.index(DONE)
    labels = np.where(done, np.asarray(OUTCOMES, dtype=object)[np.clip(outcome, 0, None)], "")
    verdicts = np.full(shape, NO_VERDICT, dtype=np.int8)
    verdicts[done] = np.broadcast_to(succeeds(labels, recalled, stuck, count), shape)[done]
    if not retry_failed:
        verdicts[status == STATUSES.index(FAILED)] = CRASHED
    conditions = {key: ConditionSearch(len(counts), starts[key], method, first_count=int(counts[0]))
                  for key in np.ndindex(shape[:count_pos] + shape[count_pos + 1:-1])}
    return SearchRun(count_pos, tuple(counts), conditions, verdicts, status == STATUSES.index(UNNEEDED),
                     replicate_rule=replicate_rule)


def condition_key(index: tuple[int, ...], count_pos: int) -> tuple[int, ...]:
    """A point's condition: its grid index without the count position and the replicate."""
    return tuple(int(i) for i in index[:count_pos] + index[count_pos + 1:-1])
