"""Tables for people: a few significant digits per column, alike down each column, within a given width.

The command line's ``--format table`` output goes through :func:`render`; csv and json keep full values.
Every column is formatted as a whole: a float column gets the decimals that give its largest value
:data:`SIGNIFICANT` significant digits, so 3.00 / 2.97 / 3.10 line up and 0.062 stands beside 0.439.
Columns of counts that are 0 in every row are left out unless the table is ``wide``; so are the
lowest-priority columns (the rightmost) that do not fit the width. Row labels (``keep``) always stay, their
values shown as the sweep file gives them.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

SIGNIFICANT = 3
"""Significant digits of the largest value of a float column."""
WIDTH = 100
"""Characters a table may take unless shown wide."""
GAP = "  "
MISSING = "NA"


@dataclass(frozen=True)
class Rendered:
    """A table as text, and the columns left out (to fit the width, or all zero)."""

    text: str
    too_wide: list[str]
    all_zero: list[str]

    def note(self) -> str:
        """One line naming what was left out and how to see it ('' when nothing was)."""
        parts = []
        if self.all_zero:
            parts.append(f"all zero: {', '.join(self.all_zero)}")
        if self.too_wide:
            parts.append(f"beyond {WIDTH} columns: {', '.join(self.too_wide)}")
        return f"columns left out ({'; '.join(parts)}); --wide shows every column" if parts else ""


def duration_text(seconds: float) -> str:
    """A duration for people: '0.4 s', '12.3 s', '3 min 05 s', '218 h 03 min' (NA when not finite)."""
    if not math.isfinite(seconds):
        return MISSING
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min" if hours else f"{minutes} min {secs:02d} s"


def decimals(values: Iterable[float], significant: int = SIGNIFICANT) -> int:
    """Decimals that show the largest magnitude of ``values`` with ``significant`` digits (0 to 6)."""
    finite = [abs(v) for v in values if math.isfinite(v) and v != 0]
    if not finite:
        return 0
    if all(float(v).is_integer() for v in finite):
        return 0
    return int(min(max(significant - 1 - math.floor(math.log10(max(finite))), 0), 6))


def column_cells(values: pd.Series, duration: bool = False, label: bool = False) -> list[str]:
    """The cells of one column as text, formatted alike (see the module docstring); a ``label`` column (a sweep
    axis) shows its values as the sweep file gives them (0.05, not 0.0500)."""
    if label:
        return [MISSING if _missing(v) else f"{v:g}" if isinstance(v, float) else str(v) for v in values]
    if duration:
        return [MISSING if pd.isna(v) else duration_text(float(v)) for v in values]
    if pd.api.types.is_bool_dtype(values.dtype):
        return [MISSING if _missing(v) else "yes" if v else "no" for v in values]
    if pd.api.types.is_float_dtype(values.dtype):
        floats = values.astype(float).to_numpy()
        biggest = np.nanmax(np.abs(floats)) if np.isfinite(floats).any() else 0.0
        if biggest >= 1e6 or 0 < biggest < 1e-3:
            return [MISSING if not math.isfinite(v) else f"{v:.{SIGNIFICANT - 1}e}" for v in floats]
        places = decimals(floats)
        return [MISSING if not math.isfinite(v) else f"{v:.{places}f}" for v in floats]
    return [MISSING if _missing(v) else str(v) for v in values]


def _missing(value: object) -> bool:
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _all_zero(values: pd.Series) -> bool:
    numeric = pd.to_numeric(values, errors="coerce")
    return bool(len(values)) and bool((numeric.fillna(-1) == 0).all())


def render(frame: pd.DataFrame, keep: Sequence[str] = (), hide_zero: Sequence[str] = (),
           durations: Sequence[str] = (), wide: bool = False, width: int = WIDTH) -> Rendered:
    """``frame`` as aligned text, columns in priority order (left first).

    ``keep``: columns never left out (row labels); ``hide_zero``: count columns left out when 0 in every
    row; ``durations``: columns of seconds shown as h/min/s. Unless ``wide``, columns from the right are
    left out until the table fits ``width`` characters. Text is left-aligned, numbers right-aligned.
    """
    zero = [] if wide else [c for c in frame.columns if c in hide_zero and _all_zero(frame[c])]
    columns = [c for c in frame.columns if c not in zero]
    cells = {c: column_cells(frame[c], c in durations, c in keep) for c in columns}
    sizes = {c: max([len(str(c)), *map(len, cells[c])]) for c in columns}
    too_wide: list[str] = []
    while not wide and _line_width([sizes[c] for c in columns]) > width:
        droppable = [c for c in columns if c not in keep]
        if not droppable:
            break
        too_wide.insert(0, droppable[-1])
        columns.remove(droppable[-1])
    right = {c: pd.api.types.is_numeric_dtype(frame[c].dtype) and not pd.api.types.is_bool_dtype(frame[c].dtype)
             for c in columns}

    def line(texts: list[str]) -> str:
        return GAP.join(t.rjust(sizes[c]) if right[c] else t.ljust(sizes[c]) for c, t in zip(columns, texts)).rstrip()

    rows = [line([str(c) for c in columns])]
    rows += [line([cells[c][i] for c in columns]) for i in range(len(frame))]
    return Rendered("\n".join(rows) + "\n", too_wide, zero)


def _line_width(sizes: list[int]) -> int:
    return sum(sizes) + len(GAP) * max(len(sizes) - 1, 0)
