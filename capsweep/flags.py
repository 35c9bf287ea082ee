"""Labels of the store's flag variables (CF ``flag_meanings``), in code order.

The position of a label is the integer stored for it, so these tuples only ever grow at the end.
"""

from __future__ import annotations

STATUSES: tuple[str, ...] = ("pending", "done", "failed", "unneeded")
"""Run status of a point, owned by the runner: not yet run, stored, crashed, or never needed by an adaptive
capacity search (its count lies beyond the bracket the search closed; see ``capsweep.sweeps.search``)."""

PENDING, DONE, FAILED, UNNEEDED = STATUSES
"""The status labels by name: code compares against these, never against spelled-out strings."""

OUTCOMES: tuple[str, ...] = ("stable", "runaway", "silent")
"""What the network did over a point's run (see the ``outcome`` metric definition)."""

STABLE, RUNAWAY, SILENT = OUTCOMES
"""The outcome labels by name: code compares against these, never against spelled-out strings."""

RECALL_STATES: tuple[str, ...] = ("recalled", "not_recalled", "already_active")
"""Verdict of an assembly's recall test (see the ``recall_state`` metric definition): evoked completion beyond both
nulls; not beyond them; or its members already fired above the active threshold before the cue (counted as not
recalled). An untested assembly keeps the fill value."""

RECALLED, NOT_RECALLED, ALREADY_ACTIVE = RECALL_STATES
"""The recall-state labels by name."""
