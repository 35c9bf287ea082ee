"""Fixed metric, success and capacity definitions, stored verbatim in every store's root attrs and shown in the README.

Notation: A_k is assembly k, C_k its cued members, U_k = A_k minus C_k, O = excitatory cells
outside A_k. Rates are in Hz, times in s.
"""

DEFINITIONS = """\
baseline E rate: mean excitatory rate from detection.baseline_start_s to the end of the settle phase (the \
start-up transient left out).
recall tests: at each of protocol.retention_delays_s after hold start and once after the hold, every assembly is \
cued in turn (an order drawn per point) for protocol.cue_duration_s, followed by protocol.cue_gap_s. After the \
last cue the run goes on with background only for at least detection.runaway_hold_s + detection.smoothing_s. \
Every assembly is tested, so the final test lasts assemblies.count x (cue + gap): the assembly cued last meets \
its cue (count - 1) cue periods, and as many other assemblies' cues with plasticity on, after the first. This \
exposure is stored (test_position, cue_time_s), not equalised; the order is random per point, so recall against \
test position measures its effect.
recall_score[k] (kept for comparison; recall is decided by the recall test below): the overlap of Amit, \
Gutfreund & Sompolinsky (1985, Phys Rev Lett 55:1530) on rates, \
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
recall test (decides recall, one per assembly and cue): recall window W = the cue period minus its first \
protocol.cue_skip_s (detection.recall_mode = cued) or the protocol.persistence_window_s after the cue (persistent); \
pre-cue window P = as long as W, ending at the cue's start, in the background gap after the previous cue (a config \
where P would reach into a previous cue, an imprint input or before the run is refused). \
evoked_completion_hz[k] = mean over U_k of (rate in W - rate in P): a difference, not a ratio, because a ratio is \
undefined for cells silent in P, most of them at a few Hz in a window of 0.18 s. It is compared with two nulls of \
detection.recall_null_draws draws each, scored with the same statistic in the same way: (cells) pseudo-assemblies, \
|U_k| cells drawn without replacement from every excitatory cell not cued in this cue (U_k and O together, so that \
the observed set is one the null can draw: an exact permutation test); (times) U_k itself with W and P moved \
together to uniformly drawn background-only times from hold start to the end of the run (windows overlapping no \
cue), which holds the members' own spontaneous co-activation and asks that they rise against their own background, \
not only fall less than other cells (approximate: it assumes a stationary background and needs about 1 / alpha \
independent window pairs of it to resolve alpha). Each p-value is randomised over ties: \
p = (#{null > e} + u (#{null = e} + 1)) / (n + 1), with u uniform from a generator seeded by the point's seed \
and the cue's start; under exchangeability \
it is uniform on (0, 1), so p <= alpha has probability alpha even where most counts are zero (randomised \
permutation p-value [common practice]; the (b + 1) / (m + 1) form: Phipson & Smyth 2010, Stat Appl Genet Mol \
Biol 9:39). recall_p_cells[k], recall_p_times[k]: the two p-values; recall_p_value[k]: the larger; recall_z[k]: \
(e - mean of the cells null) / its standard deviation.
recall_state[k]: already_active when the mean rate of all of A_k in P exceeds the active threshold (see \
completion) - the assembly was on before its cue, counted as not recalled; else recalled when recall_p_value <= \
detection.recall_alpha (both nulls beaten: an intersection-union test, per-test false-positive rate at most \
detection.recall_alpha); else not_recalled; the fill value for an assembly not tested. precue_rate_hz[k]: that \
mean rate of A_k in P. test_position[k]: the assembly's place in the final test's cue order (0 = first).
recalled_count: assemblies recalled in the final recall test; already_active_count: assemblies already active \
in it. Multiplicity: success needs every assembly of a point recalled, and all of them pass by chance at most as \
often as any one does, so without an effect of the cue a point succeeds with probability at most \
detection.recall_alpha at every count, with no correction; a rule asking for any one assembly recalled would need \
one (e.g. alpha / count).
overlap_recalled_count: assemblies whose overlap score in detection.recall_mode (cued: recall_score, persistent: \
persistence_score) in the final recall test is >= detection.recall_threshold (the earlier rule, kept for \
comparison; it counts assemblies that were on before their cue, and members that fell less than the others).
stuck_onset_s[k]: the runaway onset (below) of the mean rate of A_k's members instead of the population, from \
hold start to the end of the run, cue periods excluded; NaN if never. stuck_count: assemblies with an onset, \
flagged even when the population rate stays below the runaway threshold.
retention_recalled[t], retention_tested[t], retention_score[t]: assemblies recalled (by the recall test), \
assemblies cued, and their mean overlap score, in recall test t (protocol.retention_design: every assembly in every \
test, each in one test only, or one test per point); \
retention_s[k]: the longest delay after hold start up to which assembly k was recalled in every recall test that \
cued it (0 if not in the first).
age_recalled[a], age_tested[a], age_score[a], age_s[a] (protocol.imprint_order = blocked): after each assembly's \
block of presentations every assembly learned so far is cued once by the same recall test; a test of assembly k \
after block j has memory age a = j - k blocks, and age_s[a] s from the end of k's last presentation to its cue \
(mean). Recalled and reached tests at age a, and their mean overlap score.
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
success of a point: status done, outcome stable, recalled_count equal to its assemblies.count (every assembly \
recalled by the recall test, none already active) and stuck_count 0 (no assembly stuck on). A failed (crashed) \
point is neither success nor failure: it is left out and counted; a pending one \
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
control (a dim, from the sweep file's [controls] table): none = the condition itself; sham = cue input off \
(protocol.cue_rate_hz 0); frozen = no weight change after imprinting; unstructured = prewiring gain 1 and no \
learning input. A condition (other axes than count and control) is flagged when its sham or unstructured control, \
pooled over counts and replicates, has a 95 % Wilson interval whose lower end lies above detection.recall_alpha.
"""
