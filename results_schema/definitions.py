"""Fixed metric, success and capacity definitions, stored verbatim in every store's root attrs and shown in the README.

Notation: A_k is assembly k, C_k its cued members, U_k = A_k minus C_k, O = excitatory cells
outside A_k. Rates are in Hz, times in s.
"""

DEFINITIONS = """\
baseline E rate: mean excitatory rate from detection.baseline_start_s to the end of the settle phase (the \
start-up transient left out).
recall tests: at each of protocol.retention_delays_s after hold start and once after the hold, every assembly is \
cued in turn (an order drawn per point) for protocol.cue_duration_s, followed by protocol.cue_gap_s. After the \
last cue the run goes on with background only for at least detection.runaway_hold_s + detection.smoothing_s.
recall_score[k]: the overlap of Amit, Gutfreund & Sompolinsky (1985, Phys Rev Lett 55:1530) on rates, \
m = sum_i (xi_i - a) r_i / (N a (1 - a) mean rate of members), over the N excitatory cells not cued (U_k and O), \
with xi membership of A_k, a the fraction of members among them and r_i spike counts in the recall window (the \
cue period minus its first protocol.cue_skip_s); equal to 1 - mean rate of O / mean rate of U_k. 1 = perfect \
completion, 0 = chance, whatever the network size or coding level.
persistence_score[k]: recall_score in the protocol.persistence_window_s after the cue ends.
recall_quality[k], persistence[k]: Pearson correlation, over U_k and O, between spike count and membership of \
A_k, in the same windows (kept for continuity; it falls with the coding level).
recall_contrast[k]: mean count of U_k minus mean count of O, in units of the standard deviation over O.
completion[k]: fraction of U_k active in the recall window; spurious[k]: fraction of O active. A cell is active \
when its window rate exceeds max(detection.active_factor x baseline E rate, detection.active_floor_hz).
cross_talk[k]: the largest recall_score of any other assembly j != k over the cells outside A_k while k is cued.
recalled_count: number of assemblies whose score in detection.recall_mode (cued: recall_score, persistent: \
persistence_score) in the final recall test is >= detection.recall_threshold.
retention_recalled[t], retention_score[t]: assemblies recalled, and their mean score, in recall test t; \
retention_s[k]: the longest delay after hold start up to which assembly k was recalled in every recall test \
(0 if not in the first).
weight_correlation[s]: Pearson correlation over all E->E synapses between the weights at hold snapshot s and at \
hold start. assembly_contrast[s]: mean within-assembly E->E weight / mean of all other E->E weights. \
weight_in[s], weight_out[s], weight_within[s]: mean E->E weight into members from cells in no assembly, from \
members to such cells, and between members of a shared assembly.
weight_between[s]: mean E->E weight of the synapses whose pre and post cells are each in some assembly but share \
none (interference between memories).
upper_share_within[s], upper_share_between[s], upper_share_other[s] (w_ref_mode bistable only, else NaN): the \
share of E->E synapses of each class whose reference weight w_ref at hold snapshot s is in the upper state, \
w_ref > w_P/2 (w_P = plasticity.heterosynaptic.bistable_upper_weight; w_P/2 is the unstable point between the \
stable states 0 and w_P). Classes: within (pre and post share an assembly), between (as for weight_between), \
other (every other E->E synapse: at least one of pre and post in no assembly, i.e. the inflow, outflow and \
background synapses). The three partition the E->E synapses.
threads: the threads a point's simulation ran on (execution.threads for the standalone engine's OpenMP loop, 1 \
for the others). Results of one point are bitwise reproducible for a given count and differ between counts (each \
thread draws from its own random stream, and the order of floating-point sums changes).
runaway_onset_s: first time the excitatory population rate, smoothed over detection.smoothing_s, stays above \
max(detection.runaway_factor x baseline E rate, detection.runaway_floor_hz) for detection.runaway_hold_s; cue \
periods are excluded. NaN if never.
outcome: runaway if a runaway onset exists; else silent if the E rate over the last smoothing window before \
recall, or over the background-only tail after it, is below detection.silence_hz; else stable.
success of a point: status done, outcome stable and recalled_count equal to its assemblies.count (every assembly \
recalled). A failed (crashed) point is neither success nor failure: it is left out and counted; a pending one \
leaves its condition undecided.
capacity (derived at query time): for each condition of the other axes, the largest assemblies.count k such that \
every count <= k in the grid succeeds in at least a stated fraction (default 0.5) of its done replicates; 0 if \
the smallest count fails; 'at least' (only a lower bound) when k is the top of the grid; NA while a point of the \
condition is pending or a count up to the deciding one has no done replicate; flagged non-monotone when a count \
reaches that fraction after a smaller one did not. Per count: the success fraction over done replicates with a \
95 % Wilson score interval. \
Interval on k: the range (min, max) of the per-replicate capacities (replicate r: the largest k with every count \
<= k successful in r), a distribution-free summary; a replicate whose run of successes ends at a crashed point \
is left out.
"""
