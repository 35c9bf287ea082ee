"""The success rule and the capacity rule, shared by the capacity table, the prescreen's bound and the count search.

Import-light on purpose (no xarray or pandas): the search runs inside ``capsweep run``.

Words: a point *succeeds* (its verdict); a count *passes* when its replicates succeed often enough;
the capacity of a condition (a combination of the axes other than the count) follows from which of
its counts pass.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

from ..flags import STABLE

MIN_FRACTION = 0.5
"""Default fraction of replicates in which a count must succeed to pass (count towards capacity)."""


def succeeds(outcome: Any, recalled_count: Any, stuck_count: Any, count: Any) -> Any:
    """Whether a done point succeeds (scalars or arrays alike): outcome stable, every assembly recalled by the
    recall test (``recalled_count``, which leaves out already active ones) and no assembly stuck on."""
    return (outcome == STABLE) & (recalled_count == count) & (stuck_count == 0)


def count_passes(successes: int, done: int, min_fraction: float = MIN_FRACTION) -> bool | None:
    """Whether a count succeeds in at least ``min_fraction`` of its ``done`` replicates; None with none done."""
    return successes / done >= min_fraction if done else None


def leading_passes(passes: Iterable[bool | None]) -> int:
    """The capacity rule: how many counts, from the smallest, pass before the first that does not.

    ``passes`` holds one entry per count in ascending order: True (passes), False (falls short) or None
    (undecided); the run stops at the first entry that is not True. The capacity is the count at that
    position (0 when the smallest count does not pass).
    """
    lead = 0
    for passed in passes:
        if not passed:
            break
        lead += 1
    return lead


def capacity_of(counts: Sequence[int], passes: Iterable[bool | None]) -> int:
    """Largest of the ascending ``counts`` up to which every count passes (:func:`leading_passes`); 0 if none."""
    lead = leading_passes(passes)
    return int(counts[lead - 1]) if lead else 0
