"""Fixed metric definitions, stored verbatim in every store's root attrs and shown in the README.

Notation: A_k is assembly k, C_k its cued members, U_k = A_k minus C_k, O = excitatory cells
outside A_k. Rates are in Hz, times in s.
"""

DEFINITIONS = """\
recall_quality[k]: Pearson correlation, over the uncued excitatory cells (U_k and O), between each cell's spike \
count in the recall window (the cue period minus its first protocol.cue_skip_s) and membership of A_k. \
1 = perfect completion with no spurious activity; about 0 = nothing recalled.
persistence[k]: the same correlation in the protocol.persistence_window_s after the cue ends.
completion[k]: fraction of U_k active in the recall window; spurious[k]: fraction of O active. A cell is active \
when its window rate exceeds max(detection.active_factor x baseline E rate, detection.active_floor_hz); the \
baseline E rate is the mean excitatory rate over the settle phase.
cross_talk[k]: the largest recall_quality of any other assembly j != k computed while k is cued.
recalled_count: number of assemblies with recall_quality >= detection.recall_threshold.
weight_correlation[s]: Pearson correlation over all E->E synapses between the weights at hold snapshot s and at \
hold start. assembly_contrast[s]: mean within-assembly E->E weight / mean of all other E->E weights.
runaway_onset_s: first time the excitatory population rate, smoothed over detection.smoothing_s, stays above \
max(detection.runaway_factor x baseline E rate, detection.runaway_floor_hz) for detection.runaway_hold_s; cue \
periods are excluded. NaN if never.
outcome: runaway if a runaway onset exists; else silent if the E rate over the last smoothing window before \
recall is below detection.silence_hz; else stable.
capacity (derived at query time): for each cell of the other axes, the largest assemblies.count whose points are \
stable with every assembly recalled, in every replicate.
"""
