"""Store layout: every result variable, its inner dimension, dtype, units, long name and flags.

This module is the contract between the runner (which returns one value per variable for a
point) and the store (which lays out one array per variable over the sweep dims plus the
variable's inner dim). Inner dims: ``assembly`` (one entry per assembly, padded with the fill
value up to the largest count in the grid), ``snapshot`` (weight snapshots during hold) and
``time_bin`` (binned population rate trace, padded to the longest point), ``retention`` (recall
tests of the hold, then the final one) and ``age`` (memory age in learning blocks under blocked
learning, as long as ``assembly``, without a coordinate array: :data:`SIZED_LIKE`). ``GridSpec``
describes the sweep dims (its axes are :class:`capsweep.axes.Axis`); it lives here, free of Zarr
and xarray, so that expanding a sweep file imports neither.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..axes import Axis
from ..engines import NAMES as ENGINE_NAMES
from ..flags import OUTCOMES, RECALL_STATES, STATUSES
from ..registry import WEIGHT_UNIT as G_LEAK
from ..registry import in_units_of

READABLE: tuple[str, ...] = ("2.0", "2.1", "3.0", "3.1", "3.2")
"""Every store schema version this capsweep reads, oldest first; it writes the last (CHANGELOG.md says what each
changed; ``upgrade.STEPS`` holds the step from each earlier one to the next)."""
SCHEMA_VERSION = READABLE[-1]

FLAG_FILL = -1
IN_G_LEAK = in_units_of(G_LEAK)
INNER_DIMS: tuple[str, ...] = ("assembly", "snapshot", "time_bin", "retention", "age")
SIZED_LIKE: dict[str, str] = {"age": "assembly"}
"""Inner dims stored without a coordinate array (their index is their value: age 0, 1, ... blocks), each as long as
the dim it names, whose array gives the size (so an upgrade adds no data file for them)."""


@dataclass(frozen=True)
class GridSpec:
    """Shape and identity of a sweep grid; sizes of the inner dims; extra root attrs."""

    axes: tuple[Axis, ...]
    replicates: int
    n_assembly: int
    n_snapshot: int
    n_time_bin: int
    time_bin_s: float
    fingerprint: str
    attrs: dict
    n_retention: int = 1


@dataclass(frozen=True)
class Variable:
    """One per-point result variable of the store."""

    name: str
    units: str
    long_name: str
    inner: str | None = None
    dtype: str = "float64"
    flags: tuple[str, ...] = ()
    scale: str = ""  # for units "1": the unit the value is a multiple of (stored as attrs.RELATIVE_TO)

    @property
    def fill(self) -> float | int:
        """Value an unwritten or padded entry holds."""
        return FLAG_FILL if self.flags or self.dtype.startswith("int") else np.nan


VARIABLES: tuple[Variable, ...] = (
    Variable("outcome", "1", "network outcome over the whole run", dtype="int8", flags=OUTCOMES),
    Variable("predicted_outcome", "1", "outcome predicted by the prescreen (a surrogate fitted to simulations, "
             "built on mean-field quantities)", dtype="int8", flags=OUTCOMES),
    Variable("engine", "1", "Brian2 code generation target used", dtype="int8", flags=ENGINE_NAMES),
    Variable("seed", "1", "random seed of the point (from base_seed and point id)", dtype="int64"),
    Variable("runaway_onset_s", "s", "first time the smoothed E rate stayed above the runaway threshold"),
    Variable("recalled_count", "1", "assemblies recalled by the final recall test: evoked completion beyond both "
             "nulls at detection.recall_alpha, not already active", dtype="int32"),
    Variable("already_active_count", "1", "assemblies whose members fired above the active threshold just before "
             "their cue in the final recall test", dtype="int32"),
    Variable("stuck_count", "1", "assemblies whose members' smoothed rate stayed above the runaway threshold for "
             "detection.runaway_hold_s after hold start (cue periods excluded)", dtype="int32"),
    Variable("overlap_recalled_count", "1", "assemblies whose overlap score (recall_score or persistence_score, by "
             "detection.recall_mode) reaches detection.recall_threshold in the final test (the earlier rule, kept "
             "for comparison)", dtype="int32"),
    Variable("rate_exc_baseline_hz", "Hz", "mean excitatory rate over the baseline window"),
    Variable("rate_inh_baseline_hz", "Hz", "mean inhibitory rate over the baseline window"),
    Variable("isi_cv_exc", "1", "mean ISI coefficient of variation of excitatory cells over the baseline window"),
    Variable("rate_exc_hold_end_hz", "Hz", "mean excitatory rate over the last smoothing window of the hold phase"),
    Variable("rate_exc_tail_hz", "Hz", "mean excitatory rate over the background-only tail after the last cue"),
    Variable("imprint_contrast", "1", "assembly_contrast at the end of imprinting (learned assemblies)"),
    Variable("wall_time_s", "s", "wall-clock time of the point's simulation and scoring, setup_time_s excluded"),
    Variable("setup_time_s", "s", "wall-clock time before the first simulated step: building the network, "
             "generating and compiling its code (the compile, paid by the first point of a build, lands here)"),
    Variable("simulated_time_s", "s", "biological time simulated (shorter than planned after an early abort)"),
    Variable("n_synapses", "1", "number of synapses in the network", dtype="int64"),
    Variable("threads", "1", "threads the point's simulation ran on (execution.threads on the standalone engine, "
             "else 1); results depend on it", dtype="int32"),
    Variable("recall_quality", "1", "Pearson r over uncued E cells between recall-window spike count and "
             "membership of the cued assembly", inner="assembly"),
    Variable("persistence", "1", "recall_quality in the window after the cue ends", inner="assembly"),
    Variable("recall_score", "1", "overlap of uncued E activity with the cued assembly, normalised by coding "
             "level (1 = perfect completion, 0 = chance), during the cue", inner="assembly"),
    Variable("persistence_score", "1", "recall_score in the window after the cue ends", inner="assembly"),
    Variable("recall_contrast", "1", "uncued members' mean spike count minus non-members', in non-member standard "
             "deviations, during the cue", inner="assembly"),
    Variable("recall_state", "1", "verdict of the assembly's final recall test", inner="assembly", dtype="int8",
             flags=RECALL_STATES),
    Variable("evoked_completion_hz", "Hz", "mean over uncued members of (rate in the recall window - rate in the "
             "pre-cue window) in the final recall test", inner="assembly"),
    Variable("recall_p_value", "1", "p-value of the recall test: the larger of recall_p_cells and recall_p_times",
             inner="assembly"),
    Variable("recall_p_cells", "1", "randomised p-value of evoked_completion_hz against pseudo-assemblies: as many "
             "uncued cells drawn at random, same windows", inner="assembly"),
    Variable("recall_p_times", "1", "randomised p-value of evoked_completion_hz against the same uncued members "
             "with both windows moved to background-only times after hold start", inner="assembly"),
    Variable("recall_z", "1", "evoked_completion_hz minus the pseudo-assembly mean, in pseudo-assembly standard "
             "deviations", inner="assembly"),
    Variable("precue_rate_hz", "Hz", "mean rate of the assembly's members in the pre-cue window of the final test",
             inner="assembly"),
    Variable("stuck_onset_s", "s", "first time the members' smoothed rate stayed above the runaway threshold "
             "after hold start (NaN if never)", inner="assembly"),
    Variable("test_position", "1", "the assembly's place in the final test's cue order (0 = cued first)",
             inner="assembly", dtype="int32"),
    Variable("cue_time_s", "s", "start of the assembly's cue in the final recall test (cue order is drawn per point)",
             inner="assembly"),
    Variable("retention_s", "s", "longest delay after hold start up to which the assembly was recalled in every "
             "recall test (0 if not at the first)", inner="assembly"),
    Variable("retention_delay_s", "s", "delay of each recall test after hold start (the last is the final test)",
             inner="retention"),
    Variable("retention_recalled", "1", "assemblies recalled in each recall test (the test of recalled_count)",
             inner="retention", dtype="int32"),
    Variable("retention_tested", "1", "assemblies cued in each recall test (all, or some under "
             "protocol.retention_design = 'once')", inner="retention", dtype="int32"),
    Variable("age_recalled", "1", "blocked learning: tests at this memory age (blocks since the assembly was learned) "
             "that recalled their assembly", inner="age", dtype="int32"),
    Variable("age_tested", "1", "blocked learning: tests reached at this memory age (count - age of them planned)",
             inner="age", dtype="int32"),
    Variable("age_score", "1", "blocked learning: mean overlap score (in detection.recall_mode) of the tests at this "
             "memory age", inner="age"),
    Variable("age_s", "s", "blocked learning: mean time from the end of the assembly's last presentation to its cue, "
             "over the tests at this memory age", inner="age"),
    Variable("retention_score", "1", "mean overlap score over assemblies in each recall test (in "
             "detection.recall_mode)", inner="retention"),
    Variable("completion", "1", "fraction of uncued members active in the recall window", inner="assembly"),
    Variable("spurious", "1", "fraction of non-member E cells active in the recall window", inner="assembly"),
    Variable("cross_talk", "1", "largest recall_score of any other assembly, over cells outside this one, "
             "while this one is cued", inner="assembly"),
    Variable("weight_correlation", "1", "Pearson r between E->E weights at a hold snapshot and at hold start",
             inner="snapshot"),
    Variable("assembly_contrast", "1", "mean within-assembly E->E weight / mean other E->E weight",
             inner="snapshot"),
    Variable("weight_in", "1", f"mean E->E weight into assembly members from cells in no assembly{IN_G_LEAK}",
             inner="snapshot", scale=G_LEAK),
    Variable("weight_out", "1", f"mean E->E weight from assembly members to cells in no assembly{IN_G_LEAK}",
             inner="snapshot", scale=G_LEAK),
    Variable("weight_within", "1", f"mean E->E weight between members of a shared assembly{IN_G_LEAK}",
             inner="snapshot", scale=G_LEAK),
    Variable("weight_between", "1", "mean E->E weight between members of different assemblies (pre and post "
             f"each in some assembly, sharing none){IN_G_LEAK}", inner="snapshot", scale=G_LEAK),
    Variable("upper_share_within", "1", "share of within-assembly E->E synapses whose reference weight is in the "
             "upper state (w_ref > w_P/2; bistable w_ref_mode only)", inner="snapshot"),
    Variable("upper_share_between", "1", "share of between-assembly E->E synapses whose reference weight is in the "
             "upper state (w_ref > w_P/2; bistable w_ref_mode only)", inner="snapshot"),
    Variable("upper_share_other", "1", "share of the other E->E synapses (at least one cell in no assembly) whose "
             "reference weight is in the upper state (w_ref > w_P/2; bistable w_ref_mode only)", inner="snapshot"),
    Variable("snapshot_time_s", "s", "simulated time of each weight snapshot", inner="snapshot"),
    Variable("rate_exc_hz", "Hz", "binned excitatory population rate", inner="time_bin"),
    Variable("rate_inh_hz", "Hz", "binned inhibitory population rate", inner="time_bin"),
)

BY_NAME: dict[str, Variable] = {v.name: v for v in VARIABLES}

# Written last for each point, so a crash never leaves a point that looks done but is not.
TIMINGS: tuple[str, ...] = ("wall_time_s", "setup_time_s")
"""Variables that measure the machine, not the model: the only ones two runs of a point may differ in."""

STATUS = Variable("status", "1", "run status of the point", dtype="int8", flags=STATUSES)
ERROR = "error"  # per-point error text for failed points (string variable, '' when none)
POINT_ID = "point_id"  # per-point hash of the resolved config (string variable)
WRITER_VERSION = "capsweep_version"  # per-point version of the capsweep that wrote the point (string variable)
