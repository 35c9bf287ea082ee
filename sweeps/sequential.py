"""Sequential design of a capacity sweep: per-count tallies, where more replicates decide, which count to try next.

Everything here is a pure function of the stored tallies, so a killed run that resumes from its
store makes the same decisions. Import-light on purpose (standard library only besides the shared
success rule): it runs inside ``capsweep run``.

- A *tally* is what the store says about one assembly count of one condition: successes out of
  the decided replicates (done and not crashed), and the crashed ones. Pending and unneeded
  points are in no tally: they never count as failures.
- **Replicates where they decide.** A count is *undecided* while its Wilson score interval
  (Wilson 1927, J Am Stat Assoc 22:209, at ``CONFIDENCE``) contains the threshold: lower end
  below it and upper end at or above it (a count passes when its fraction is >= the threshold,
  :func:`capsweep.sweeps.success.count_passes`). An undecided count gets ``REPLICATE_BATCH`` more
  replicates per round until it is decided or has used ``REPLICATE_CAP`` replicates (decided plus
  crashed, so repeated crashes cannot loop). At threshold 0.5 and 95 %, 5 of 5 or 0 of 5
  replicates decide a count and 3 of 3 never does ([derived]: the Wilson lower end of n of n is
  n / (n + z^2) with z^2 = 3.84). Data-dependent stopping leaves the likelihood of the fitted
  success curve unchanged (the likelihood principle), so :mod:`capsweep.sweeps.capacity_fit` reads
  these tallies as it reads a fixed design; the coverage benchmark measures it
  (``benchmarks/capacity_coverage.py``).
- **An open upper end.** :func:`next_count` grows the count until a count fails (doubling from
  the start, never above a hard ceiling), halves down while nothing passes, then fills in between
  the largest passing count and the smallest failing one at the geometric midpoint until the two
  are adjacent: a searched capacity is then bracketed by a passing and a failing count, or
  censored at the ceiling (everything passes) or below 1 (count 1 fails).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from statistics import NormalDist
from typing import NamedTuple

from .success import MIN_FRACTION

CONFIDENCE = 0.95
"""Level of the Wilson interval that decides whether a count needs more replicates."""
REPLICATE_BATCH = 2
"""Replicates added to an undecided count per round."""
REPLICATE_CAP = 10
"""Most replicates (decided + crashed) one count of one condition may use (with 3 to start, the design then
matches a fixed 10-replicate grid's accuracy on fewer replicates: ``benchmarks/capacity_coverage.py``)."""


class Tally(NamedTuple):
    """Decided replicates of one assembly count in one condition.

    ``successes`` of ``decided`` replicates succeeded (done, not crashed); ``crashed`` replicates
    ended in an error and count in no fraction. Pending and unneeded points are in no tally.
    """

    successes: int
    decided: int
    crashed: int = 0


def wilson_interval(successes: int, trials: int, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Wilson score interval of a success fraction (Wilson 1927, J Am Stat Assoc 22:209); (nan, nan) for no trials.

    centre = (p + z^2 / 2n) / (1 + z^2 / n), half width = z sqrt(p (1 - p) / n + z^2 / 4n^2) / (1 + z^2 / n),
    with p = successes / trials and z the standard normal quantile at (1 + confidence) / 2.
    """
    if trials == 0:
        return math.nan, math.nan
    z = NormalDist().inv_cdf(0.5 + confidence / 2)
    p, shrink = successes / trials, 1 + z * z / trials
    centre = (p + z * z / (2 * trials)) / shrink
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / shrink
    # the interval contains p in exact arithmetic; rounding put 13/13's upper end at 1 - 1e-16 and 0/5's lower at 3e-17
    return min(p, max(0.0, centre - half)), max(p, min(1.0, centre + half))


def undecided(tally: Tally, threshold: float = MIN_FRACTION, confidence: float = CONFIDENCE) -> bool:
    """Whether the count's Wilson interval still contains ``threshold`` (False with no decided replicate)."""
    low, high = wilson_interval(tally.successes, tally.decided, confidence)
    return tally.decided > 0 and low < threshold <= high


def replicates_to_add(tallies: Mapping[int, Tally], threshold: float = MIN_FRACTION, confidence: float = CONFIDENCE,
                      batch: int = REPLICATE_BATCH, cap: int = REPLICATE_CAP) -> dict[int, int]:
    """Per assembly count: how many more replicates to run now (counts that need none are left out).

    ``tallies`` maps each count to its tally; call it for counts with no replicate pending (a
    round ends when its replicates have landed). A count with no decided replicate is the count
    search's business, not this function's.
    """
    if batch < 1 or cap < 1:
        raise ValueError(f"batch and cap must be at least 1, got batch={batch}, cap={cap}")
    used = {count: tally.decided + tally.crashed for count, tally in tallies.items()}
    return {count: min(batch, cap - used[count]) for count, tally in sorted(tallies.items())
            if used[count] < cap and undecided(tally, threshold, confidence)}


def next_count(passes: Mapping[int, bool], start: int, ceiling: int, floor: int = 1) -> int | None:
    """The next assembly count to run in an open-ended count search, or None when the capacity is bracketed.

    ``passes`` maps each count run so far to whether it passes (the success rule of capacity,
    :func:`capsweep.sweeps.success.count_passes`). With ``hi`` the smallest failing count and ``lo`` the
    largest passing count below it (``floor`` - 1 if none): nothing run yet -> ``start``; no failure yet ->
    double ``lo`` (at most ``ceiling``; None once ``lo`` is the ceiling: censored above); no pass below
    ``hi`` -> halve ``hi`` (not below ``floor``; None when ``hi`` is the floor: censored below); else the
    geometric midpoint of ``lo`` and ``hi``, None once they are adjacent. Passing counts above ``hi``
    (non-monotone success) do not move the bracket. Counts are numbers of assemblies,
    1 <= floor <= start <= ceiling.
    """
    if not 1 <= floor <= start <= ceiling:
        raise ValueError(f"need 1 <= floor <= start <= ceiling, got floor={floor}, start={start}, ceiling={ceiling}")
    if not passes:
        return start
    hi = min((count for count, ok in passes.items() if not ok), default=None)
    lo = max((count for count, ok in passes.items() if ok and (hi is None or count < hi)), default=floor - 1)
    if hi is None:
        return None if lo >= ceiling else min(2 * lo, ceiling)
    if hi - lo <= 1:
        return None
    if lo < floor:
        return max(hi // 2, floor)
    return min(max(round(math.sqrt(lo * hi)), lo + 1), hi - 1)
