"""Labels of the store's flag variables (CF ``flag_meanings``), in code order.

The position of a label is the integer stored for it, so these tuples only ever grow at the end.
"""

from __future__ import annotations

STATUSES: tuple[str, ...] = ("pending", "done", "failed")
"""Run status of a point, owned by the runner: not yet run, stored, or crashed."""

OUTCOMES: tuple[str, ...] = ("stable", "runaway", "silent")
"""What the network did over a point's run (see the ``outcome`` metric definition)."""
