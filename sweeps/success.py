"""The success rule of capacity, shared by the capacity table and the adaptive count search.

Import-light on purpose (no xarray or pandas): the search runs inside ``capsweep run``.
"""

from __future__ import annotations

from typing import Any

from ..flags import STABLE

MIN_FRACTION = 0.5
"""Default fraction of replicates in which a count must succeed to count towards capacity."""


def succeeds(outcome: Any, recalled_count: Any, count: Any) -> Any:
    """Whether a done point succeeds: outcome stable and every assembly recalled (scalars or arrays alike)."""
    return (outcome == STABLE) & (recalled_count == count)


def count_passes(successes: int, done: int, min_fraction: float = MIN_FRACTION) -> bool | None:
    """Whether a count succeeds in at least ``min_fraction`` of its ``done`` replicates; None with none done."""
    return successes / done >= min_fraction if done else None
