"""The control table: companion points that a sweep's ``[controls]`` table adds beside every condition.

A control is the condition's own config with a few keys overridden (applied after every axis and variant, so a
control wins over an axis that sets the same key). Each control answers what the measurement shows without the
thing it is meant to measure; the recall test's false-positive rate is the yardstick for those that remove the
memory or its cue (``false_positive``). Import-light (no numpy): the sweep file reader uses it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .axes import VARIANT_KEY, Axis


@dataclass(frozen=True)
class Control:
    """One control kind: its label on the control dim, what it changes, and its config overrides."""

    name: str
    summary: str
    overrides: dict[str, Any]
    false_positive: bool  # no memory or no cue: its success estimates the recall test's false-positive rate


CONTROL_DIM = "control"
"""The store dim of the controls (reserved: no sweep axis may take this name)."""
AS_IS = "none"
"""The control dim's first label: the condition itself, no control applied."""

CONTROLS: tuple[Control, ...] = (
    Control("sham", "sham cue: the same protocol with the cue input off (protocol.cue_rate_hz = 0)",
            {"protocol.cue_rate_hz": 0.0}, True),
    Control("frozen", "plasticity frozen after imprinting (after settle for prewired assemblies)",
            {"plasticity.freeze_after_imprint": True}, False),
    Control("unstructured", "no structure: prewiring gain 1 (prewired assemblies) and no learning input "
            "(protocol.imprint_rate_hz = 0, learned assemblies); each key has no effect in the other mode",
            {"assemblies.prewire_gain": 1.0, "protocol.imprint_rate_hz": 0.0}, True),
)
BY_NAME: dict[str, Control] = {c.name: c for c in CONTROLS}


def control_axis(labels: tuple[str, ...]) -> Axis:
    """The control dim's axis over ``labels`` (``AS_IS``, then control kinds): an axis over named variants, last in
    the grid so that a control's overrides apply after every other axis."""
    return Axis(CONTROL_DIM, VARIANT_KEY, labels, long_name=f"control beside each condition: {AS_IS} (the condition "
                "itself) or a control kind of the sweep file's [controls] table (see capsweep.controls)")
